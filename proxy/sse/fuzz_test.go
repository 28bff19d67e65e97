package sse_test

import (
	"bytes"
	"errors"
	"io"
	"strings"
	"testing"
	"testing/iotest"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/sse"
)

// FuzzReader checks that the reader never panics on any input, that its
// result does not depend on how the input is split into reads, that no event
// exceeds the bound, and that whatever Writer writes Reader reads back, with
// line breaks normalised to "\n".
func FuzzReader(f *testing.F) {
	for _, seed := range []string{
		"",
		"data: {\"id\":\"cmpl-1\",\"choices\":[{\"text\":\" hive\"}]}\n\ndata: [DONE]\n\n",
		"data: a\r\n\r\ndata: b\r\rdata: c\n\n",
		"\uFEFFevent: x\nid: 1\nretry: 10\ndata\n\n",
		": comment\ndata:no space\ndata:  two spaces\n\n",
		"id: a\x00b\ndata: x\n\n",
		"data: truncated",
		"data: x\r",
		"\r\n\r\n\n\r",
		"data: \xff\xfe invalid utf-8\n\n",
		strings.Repeat("data: x\n", 40) + "\n",
		"data: " + strings.Repeat("y", 200) + "\n\n",
	} {
		f.Add([]byte(seed))
	}
	const limit = 128
	f.Fuzz(func(t *testing.T, in []byte) {
		whole, wholeErr := readAll(t, sse.NewReaderSize(bytes.NewReader(in), limit))
		split, splitErr := readAll(t, sse.NewReaderSize(iotest.OneByteReader(bytes.NewReader(in)), limit))
		require.Equal(t, split, whole, "events differ by read size: whole %#v, one byte at a time %#v", whole, split)
		require.True(t, sameOutcome(wholeErr, splitErr), "end differs by read size: %v vs %v", wholeErr, splitErr)
		for _, ev := range whole {
			require.LessOrEqual(t, len(ev.Data), limit, "event data of %d bytes passed a bound of %d", len(ev.Data), limit)
		}

		// Round trip: in as the data of one event.
		var buf bytes.Buffer
		require.NoError(t, sse.NewWriter(&buf).WriteData(in))
		got, err := readAll(t, sse.NewReaderSize(&buf, 1<<20))
		want := strings.NewReplacer("\r\n", "\n", "\r", "\n").Replace(string(in))
		require.Len(t, got, 1, "round trip of %q: events %#v, end %v; want one event with data %q then io.EOF", in, got, err, want)
		require.Equal(t, want, got[0].Data, "round trip of %q: events %#v, end %v; want one event with data %q then io.EOF", in, got, err, want)
		require.True(t, err == io.EOF, "round trip of %q: events %#v, end %v; want one event with data %q then io.EOF", in, got, err, want)
	})
}

func sameOutcome(a, b error) bool {
	for _, target := range []error{io.EOF, io.ErrUnexpectedEOF, sse.ErrTooLarge} {
		if errors.Is(a, target) != errors.Is(b, target) {
			return false
		}
	}
	return true
}
