package scrub_test

import (
	"bytes"
	"encoding/base64"
	"encoding/json"
	"io"
	"net/http"
	"strings"
	"testing"
	"testing/iotest"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/scrub"
)

const key = "sk-live/4f9a+Zq_81c"

// leaks lists the forms of key that s still holds.
func leaks(s string) []string {
	var out []string
	for _, prefix := range []string{"", "Bearer ", "apikey:", "u:", "longer-user:"} {
		for _, enc := range []*base64.Encoding{base64.StdEncoding, base64.URLEncoding, base64.RawStdEncoding, base64.RawURLEncoding} {
			e := enc.EncodeToString([]byte(prefix + key))
			if strings.Contains(s, e) {
				out = append(out, e)
			}
			// Decoding what is left must not give the key back.
			if b, err := enc.DecodeString(s); err == nil && bytes.Contains(b, []byte(key)) {
				out = append(out, "decodes to the key")
			}
		}
	}
	if strings.Contains(s, key) {
		out = append(out, key)
	}
	if strings.Contains(s, strings.ReplaceAll(key, "/", `\/`)) {
		out = append(out, "JSON-escaped key")
	}
	return out
}

func TestBytesMasksEveryForm(t *testing.T) {
	s, short := scrub.New([]string{key, "", "tiny"})
	require.NotNil(t, s)
	assert.Equal(t, []string{"tiny"}, short, "a key too short to scrub is reported")
	quoted, _ := json.Marshal(map[string]string{"k": key})
	tests := []struct{ name, in string }{
		{"as is", "key " + key + " refused"},
		{"bearer header", "Authorization: Bearer " + key},
		{"JSON with escaped slash", `{"auth":"Bearer ` + strings.ReplaceAll(key, "/", `\/`) + `"}`},
		{"JSON as Go writes it", string(quoted)},
		{"base64 of the key", base64.StdEncoding.EncodeToString([]byte(key))},
		{"base64 of the bearer header", base64.StdEncoding.EncodeToString([]byte("Bearer " + key))},
		{"url-safe base64 of the header", base64.URLEncoding.EncodeToString([]byte("Bearer " + key))},
		{"Basic credential", "Basic " + base64.StdEncoding.EncodeToString([]byte("apikey:"+key))},
		{"Basic credential, other user", base64.StdEncoding.EncodeToString([]byte("u:" + key))},
		{"Basic credential, longer user", base64.RawStdEncoding.EncodeToString([]byte("longer-user:" + key))},
		{"twice", key + key},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			require.NotEmpty(t, leaks(tt.in), "the case does not hold the key")
			out := s.Bytes([]byte(tt.in))
			assert.Len(t, out, len(tt.in), "masking changed the length")
			assert.Empty(t, leaks(string(out)), "left in %q", out)
		})
	}
	plain := []byte(`{"choices":[{"text":" the barge sails at dawn"}]}`)
	assert.Equal(t, string(plain), string(s.Bytes(bytes.Clone(plain))), "text without the key changed")
}

func TestHeaderValuesAreMasked(t *testing.T) {
	s, _ := scrub.New([]string{key})
	h := http.Header{"Www-Authenticate": {`Bearer error="invalid_token", token="` + key + `"`}, "Content-Type": {"application/json"}}
	s.Header(h)
	assert.Empty(t, leaks(h.Get("Www-Authenticate")))
	assert.Equal(t, "application/json", h.Get("Content-Type"))
}

func TestReaderMasksAcrossReadBoundaries(t *testing.T) {
	s, _ := scrub.New([]string{key})
	text := "data: {\"text\":\"" + key + "\"}\n\ndata: " + base64.StdEncoding.EncodeToString([]byte("Bearer "+key)) + "\n\n" + key
	want := string(s.Bytes([]byte(text)))
	tests := []struct {
		name string
		r    func(io.Reader) io.Reader
	}{
		{"whole", func(r io.Reader) io.Reader { return r }},
		{"one byte at a time", iotest.OneByteReader},
		{"half reads", iotest.HalfReader},
		{"data with EOF", iotest.DataErrReader},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := io.ReadAll(s.Reader(tt.r(strings.NewReader(text))))
			require.NoError(t, err)
			assert.Equal(t, want, string(got))
			assert.Empty(t, leaks(string(got)))
		})
	}
	for cut := 1; cut < len(text); cut++ {
		got, err := io.ReadAll(s.Reader(io.MultiReader(strings.NewReader(text[:cut]), strings.NewReader(text[cut:]))))
		require.NoError(t, err)
		require.Equal(t, want, string(got), "split at %d", cut)
	}
}

// TestReaderPassesEventsAtOnce checks that a stream's bytes are held back
// only while they may begin a key: a relayed event must reach the client
// before the next one is produced.
func TestReaderPassesEventsAtOnce(t *testing.T) {
	s, _ := scrub.New([]string{key})
	pr, pw := io.Pipe()
	rd := s.Reader(pr)
	event := "data: {\"text\":\" the hive\"}\n\n"
	go func() { _, _ = io.WriteString(pw, event) }() // and nothing more yet
	buf := make([]byte, 4096)
	n, err := io.ReadAtLeast(rd, buf, len(event))
	require.NoError(t, err)
	assert.Equal(t, event, string(buf[:n]))

	// A chunk ending in the start of the key is held until it is complete.
	go func() { _, _ = io.WriteString(pw, "x "+key[:5]) }()
	n, err = rd.Read(buf)
	require.NoError(t, err)
	assert.Equal(t, "x ", string(buf[:n]))
	go func() { _, _ = io.WriteString(pw, key[5:]+" y"); pw.Close() }()
	rest, err := io.ReadAll(rd)
	require.NoError(t, err)
	assert.Equal(t, strings.Repeat("*", len(key))+" y", string(rest))
}

func TestNilScrubberPassesEverything(t *testing.T) {
	s, _ := scrub.New(nil)
	assert.Nil(t, s)
	assert.Equal(t, "Bearer "+key, string(s.Bytes([]byte("Bearer "+key))))
	got, err := io.ReadAll(s.Reader(strings.NewReader(key)))
	require.NoError(t, err)
	assert.Equal(t, key, string(got))
}

// FuzzReader checks that a masking reader gives out exactly what masking
// the whole text at once gives, however the text is cut into reads.
func FuzzReader(f *testing.F) {
	f.Add([]byte("x "+key+" y"), uint8(3))
	f.Add([]byte(base64.StdEncoding.EncodeToString([]byte("Bearer "+key))), uint8(1))
	f.Add([]byte(key[:7]+key), uint8(7))
	s, _ := scrub.New([]string{key, "other-secret-value"})
	f.Fuzz(func(t *testing.T, text []byte, step uint8) {
		want := s.Bytes(bytes.Clone(text))
		r := io.Reader(bytes.NewReader(text))
		if step > 0 {
			r = &chunked{r: r, n: int(step)}
		}
		// Read into buffers of a size set by step too, small ones
		// included.
		rd := s.Reader(r)
		size := 1 + int(step)%64
		var got []byte
		buf := make([]byte, size)
		for {
			n, err := rd.Read(buf)
			got = append(got, buf[:n]...)
			if err == io.EOF {
				break
			}
			require.NoError(t, err)
		}
		require.True(t, bytes.Equal(got, want), "read %q, want %q", got, want)
	})
}

// chunked reads at most n bytes at a time.
type chunked struct {
	r io.Reader
	n int
}

func (c *chunked) Read(p []byte) (int, error) {
	if len(p) > c.n {
		p = p[:c.n]
	}
	return c.r.Read(p)
}

// TestReaderIntoSmallBuffers reads with buffers shorter than a held-back
// tail, which the reader then keeps on its own.
func TestReaderIntoSmallBuffers(t *testing.T) {
	s, _ := scrub.New([]string{key})
	text := "aa " + key[:9] + "| " + key + " zz " + key[:12]
	want := string(s.Bytes([]byte(text)))
	for size := 1; size <= 8; size++ {
		rd := s.Reader(iotest.HalfReader(strings.NewReader(text)))
		var got []byte
		buf := make([]byte, size)
		for {
			n, err := rd.Read(buf)
			got = append(got, buf[:n]...)
			if err == io.EOF {
				break
			}
			require.NoError(t, err)
		}
		assert.Equal(t, want, string(got), "buffers of %d bytes", size)
	}
}
