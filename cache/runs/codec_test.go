package runs

import (
	"bytes"
	"context"
	"crypto/sha256"
	"io"
	"strings"
	"testing"
	"testing/iotest"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestRecordRoundTrip(t *testing.T) {
	tests := []record{
		{Entry: Entry{Seq: 1, Key: "k", Occurrence: 1, Ref: refOf(nil), Time: time.Unix(0, 0).UTC()}, Status: 200},
		{Entry: Entry{Seq: 1 << 40, Key: strings.Repeat("é", 300), Occurrence: 1 << 33, Ref: refOf([]byte("x")),
			Outcome: "miss", Upstream: true, CostNanos: -5, SavedNanos: 1 << 62, Model: "m", Stream: true,
			Time: time.Date(2262, 1, 1, 0, 0, 0, 1, time.UTC)}, Status: 599, ContentType: "text/event-stream"},
		{Entry: Entry{Seq: 7, Key: "k", Occurrence: 2, Ref: refOf([]byte("y")), Time: time.Date(1700, 1, 1, 0, 0, 0, 0, time.UTC)}, Status: 100},
	}
	for i, want := range tests {
		b, err := encodeRecord(&want)
		require.NoError(t, err)
		got, err := decodeRecord(b)
		require.NoError(t, err, "case %d", i)
		assert.Equal(t, want.Time, got.Time, "case %d: time", i)
		got.Time, want.Time = time.Time{}, time.Time{}
		assert.Equal(t, want, got, "case %d", i)
	}
}

// TestDecodeDamaged decodes every truncation and every single-bit change
// of a record and of a tally: each is an ErrCorrupt or decodes, never a
// panic, and truncations are always errors.
func TestDecodeDamaged(t *testing.T) {
	r := record{Entry: Entry{Seq: 3, Key: "key", Occurrence: 2, Ref: refOf([]byte("b")), Outcome: "hit", Model: "m",
		Time: time.Unix(1700000000, 5).UTC()}, Status: 200, ContentType: "application/json"}
	rb, _ := encodeRecord(&r)
	tb := encodeTally(&tally{Calls: 3, Upstream: 1, Cost: 9, Saved: 2, Keys: 2, Bodies: 2, Bytes: 10, First: 1, Last: 2})
	decoders := []struct {
		name   string
		b      []byte
		decode func([]byte) error
	}{
		{"record", rb, func(b []byte) error { _, err := decodeRecord(b); return err }},
		{"tally", tb, func(b []byte) error { _, err := decodeTally(b); return err }},
	}
	for _, d := range decoders {
		require.NoError(t, d.decode(d.b), "%s: undamaged", d.name)
		for n := range len(d.b) {
			assert.ErrorIs(t, d.decode(d.b[:n]), ErrCorrupt, "%s truncated to %d: got", d.name, n)
		}
		for i := range len(d.b) * 8 {
			b := bytes.Clone(d.b)
			b[i/8] ^= 1 << (i % 8)
			if err := d.decode(b); err != nil {
				assert.ErrorIs(t, err, ErrCorrupt, "%s bit %d: nil or ErrCorrupt", d.name, i)
			}
		}
	}
}

func TestValidID(t *testing.T) {
	tests := []struct {
		id   string
		ok   bool
		want string // in the error
	}{
		{"a", true, ""},
		{"sweep-2026.03_b", true, ""},
		{strings.Repeat("x", 128), true, ""},
		{"", false, "empty"},
		{strings.Repeat("x", 129), false, "129 characters"},
		{"has space", false, `' '`},
		{"slash/y", false, `'/'`},
		{"brace}", false, `'}'`},
		{"naïve", false, "byte 2"},
	}
	for _, tc := range tests {
		err := ValidID(tc.id)
		if tc.ok {
			assert.NoError(t, err, "ValidID(%.20q)", tc.id)
		} else if assert.ErrorIs(t, err, ErrInvalid, "ValidID(%.20q)", tc.id) {
			assert.Contains(t, err.Error(), tc.want, "ValidID(%.20q)", tc.id)
		}
	}
}

// TestTrailerReader feeds an archive-shaped stream in reads of every
// shape: the trailer is found however the bytes arrive.
func TestTrailerReader(t *testing.T) {
	body := bytes.Repeat([]byte("0123456789"), 500)
	sum := sha256.Sum256(body)
	good := append(append(bytes.Clone(body), trailerHead...), sum[:]...)
	bad := bytes.Clone(good)
	bad[len(bad)-1] ^= 1
	readers := []struct {
		name string
		wrap func(io.Reader) io.Reader
	}{
		{"whole", func(r io.Reader) io.Reader { return r }},
		{"one byte", iotest.OneByteReader},
		{"half", iotest.HalfReader},
		{"data with EOF", iotest.DataErrReader},
	}
	for _, rd := range readers {
		for _, tc := range []struct {
			name string
			in   []byte
			want bool
		}{{"good", good, true}, {"bad sum", bad, false}, {"no trailer", body, false}, {"short", good[:30], false}} {
			tr := newTrailerReader(context.Background(), rd.wrap(bytes.NewReader(tc.in)), 1<<20)
			got, err := io.ReadAll(tr)
			require.NoError(t, err, "%s/%s", rd.name, tc.name)
			require.True(t, bytes.Equal(got, tc.in), "%s/%s: passed %d bytes, not the input", rd.name, tc.name, len(got))
			assert.Equal(t, tc.want, tr.check(), "%s/%s: check", rd.name, tc.name)
		}
	}
}
