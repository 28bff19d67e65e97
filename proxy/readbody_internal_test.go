package proxy

import (
	"io"
	"net/http"
	"net/textproto"
	"strings"
	"testing"
	"testing/iotest"

	"github.com/stretchr/testify/require"

	"github.com/stretchr/testify/assert"
)

// TestReadAllSized: whatever the announced length says, the whole body and
// nothing else comes back, and the reader's errors are kept.
func TestReadAllSized(t *testing.T) {
	body := strings.Repeat("honey ", 50) // 300 bytes
	cases := []struct {
		name      string
		announced int64
		limit     int64
		r         func() io.Reader
		want      string
		wantErr   error
	}{
		{"exact", 300, 1 << 20, func() io.Reader { return strings.NewReader(body) }, body, nil},
		{"unknown length", -1, 1 << 20, func() io.Reader { return strings.NewReader(body) }, body, nil},
		{"announced too short", 10, 1 << 20, func() io.Reader { return strings.NewReader(body) }, body, nil},
		{"announced too long", 5000, 1 << 20, func() io.Reader { return strings.NewReader(body) }, body, nil},
		{"announced past the limit", 1 << 30, 1 << 20, func() io.Reader { return strings.NewReader(body) }, body, nil},
		{"one byte at a time", 300, 1 << 20, func() io.Reader { return iotest.OneByteReader(strings.NewReader(body)) }, body, nil},
		{"empty", 0, 1 << 20, func() io.Reader { return strings.NewReader("") }, "", nil},
		{"reader fails", 300, 1 << 20, func() io.Reader { return iotest.TimeoutReader(strings.NewReader(body)) }, "", iotest.ErrTimeout},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, err := readAllSized(tc.r(), tc.announced, tc.limit)
			if tc.wantErr != nil {
				require.ErrorIs(t, err, tc.wantErr, "err = %v, want %v", err, tc.wantErr)
				return
			}
			require.NoError(t, err)
			require.True(t, string(got) == tc.want, "got %d bytes; want the %d bytes sent", len(got), len(tc.want))
		})
	}
}

// TestHeaderNamesCanonical: the proxy writes and reads these names in the
// header map directly, which is right only for canonical names.
func TestHeaderNamesCanonical(t *testing.T) {
	for _, name := range []string{HeaderCacheStatus, HeaderCachedPrompt, HeaderRun, HeaderRunMode, HeaderReplaySession, HeaderRecordedCost, HeaderRecordedSaved, HeaderCost, HeaderSaved, HeaderBudgetLeft, HeaderModelsMissing, "Content-Type", "Content-Length", "Cache-Control"} {
		c := textproto.CanonicalMIMEHeaderKey(name)
		assert.Equal(t, name, c, "%q is not canonical (%q)", name, c)
	}
	h := (http.Header{"Stint-Run": {"r1"}})
	assert.Equal(t, "r1", h.Get(HeaderRun), "direct map key does not match Header.Get")
}
