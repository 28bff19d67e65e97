package sse_test

import (
	"errors"
	"io"
	"strings"
	"testing"
	"testing/iotest"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/sse"
)

// readAll reads events until an error and returns them with that error.
func readAll(tb testing.TB, r *sse.Reader) ([]sse.Event, error) {
	tb.Helper()
	var evs []sse.Event
	for {
		ev, err := r.Next()
		if err != nil {
			return evs, err
		}
		evs = append(evs, ev)
	}
}

func TestReaderRules(t *testing.T) {
	tests := []struct {
		name    string
		section string // the WHATWG HTML section whose rule the case checks
		in      string
		want    []sse.Event
		wantErr error // io.EOF for a clean end
	}{
		{
			name: "LF line ends", section: "9.2.5 end-of-line",
			in:   "data: a\n\ndata: b\n\n",
			want: []sse.Event{{Data: "a"}, {Data: "b"}}, wantErr: io.EOF,
		},
		{
			name: "CRLF line ends", section: "9.2.5 end-of-line",
			in:   "data: a\r\n\r\ndata: b\r\n\r\n",
			want: []sse.Event{{Data: "a"}, {Data: "b"}}, wantErr: io.EOF,
		},
		{
			name: "CR line ends", section: "9.2.5 end-of-line",
			in:   "data: a\r\rdata: b\r\r",
			want: []sse.Event{{Data: "a"}, {Data: "b"}}, wantErr: io.EOF,
		},
		{
			name: "mixed line ends", section: "9.2.5 end-of-line",
			in:   "data: a\rdata: b\r\ndata: c\n\r\n",
			want: []sse.Event{{Data: "a\nb\nc"}}, wantErr: io.EOF,
		},
		{
			name: "leading byte-order mark dropped", section: "9.2.5 (one leading U+FEFF ignored)",
			in:   "\uFEFFdata: a\n\n",
			want: []sse.Event{{Data: "a"}}, wantErr: io.EOF,
		},
		{
			name: "second byte-order mark kept in the field name", section: "9.2.5",
			in:   "\uFEFF\uFEFFdata: a\n\ndata: b\n\n",
			want: []sse.Event{{Data: "b"}}, wantErr: io.EOF,
		},
		{
			// WHATWG 9.2.6 example (from memory: the HTML standard is not at hand here): three data lines of a
			// stock ticker are one event joined with LF.
			name: "data lines joined with LF", section: "9.2.6 data field",
			in:   "data: YHOO\ndata: +2\ndata: 10\n\n",
			want: []sse.Event{{Data: "YHOO\n+2\n10"}}, wantErr: io.EOF,
		},
		{
			// WHATWG 9.2.6 example (from memory): "data:test" and
			// "data: test" are the same event.
			name: "one optional space removed", section: "9.2.6 collect value, remove one U+0020",
			in:   "data:test\n\ndata: test\n\ndata:  two\n\n",
			want: []sse.Event{{Data: "test"}, {Data: "test"}, {Data: " two"}}, wantErr: io.EOF,
		},
		{
			name: "only the first colon splits", section: "9.2.6 first U+003A COLON",
			in:   "data: {\"a\":\"b: c\"}\n\n",
			want: []sse.Event{{Data: `{"a":"b: c"}`}}, wantErr: io.EOF,
		},
		{
			name: "comment lines ignored", section: "9.2.6 line starts with U+003A COLON",
			in:   ": keep-alive\ndata: a\n:another\n\n: trailing comment\n",
			want: []sse.Event{{Data: "a"}}, wantErr: io.EOF,
		},
		{
			// WHATWG 9.2.6 example (from memory): a bare "data" line is
			// a data field with an empty value; the first block is an
			// event with empty data, the second has data "\n".
			name: "field without colon has empty value", section: "9.2.6 line without U+003A COLON",
			in:   "data\n\ndata\ndata\n\n",
			want: []sse.Event{{Data: ""}, {Data: "\n"}}, wantErr: io.EOF,
		},
		{
			name: "event field names the event", section: "9.2.6 event field",
			in:   "event: update\ndata: a\n\ndata: b\n\n",
			want: []sse.Event{{Name: "update", Data: "a"}, {Data: "b"}}, wantErr: io.EOF,
		},
		{
			// WHATWG 9.2.6 example (from memory): "id" with no value
			// resets the last event ID to the empty string.
			name: "id persists until changed", section: "9.2.6 id field, last event ID buffer",
			in:      "data: first event\nid: 1\n\ndata: second\n\ndata:second event\nid\n\ndata: x\n\n",
			want:    []sse.Event{{ID: "1", Data: "first event"}, {ID: "1", Data: "second"}, {ID: "", Data: "second event"}, {Data: "x"}},
			wantErr: io.EOF,
		},
		{
			name: "id containing NULL ignored", section: "9.2.6 id field contains U+0000",
			in:   "id: 7\ndata: a\n\nid: 8\x009\ndata: b\n\n",
			want: []sse.Event{{ID: "7", Data: "a"}, {ID: "7", Data: "b"}}, wantErr: io.EOF,
		},
		{
			name: "block without data dispatches nothing and resets the event type", section: "9.2.6 dispatch step: empty data buffer",
			in:   "event: lonely\n\ndata: a\n\n",
			want: []sse.Event{{Data: "a"}}, wantErr: io.EOF,
		},
		{
			name: "unknown fields ignored", section: "9.2.6 otherwise the field is ignored",
			in:   "foo: bar\nData: x\ndata: a\n\n",
			want: []sse.Event{{Data: "a"}}, wantErr: io.EOF,
		},
		{
			name: "blank lines between events", section: "9.2.6 blank line dispatch",
			in:   "\n\n\ndata: a\n\n\n\n",
			want: []sse.Event{{Data: "a"}}, wantErr: io.EOF,
		},
		{
			name: "empty stream", section: "9.2.5 stream",
			in: "", wantErr: io.EOF,
		},
		{
			name: "final event without blank line not dispatched", section: "9.2.6 end of file discards pending data",
			in:   "data: a\n\ndata: b\n",
			want: []sse.Event{{Data: "a"}}, wantErr: io.ErrUnexpectedEOF,
		},
		{
			name: "stream ends mid-line", section: "9.2.6 end of file discards pending data",
			in:   "data: a\n\ndata: {\"tru",
			want: []sse.Event{{Data: "a"}}, wantErr: io.ErrUnexpectedEOF,
		},
		{
			name: "final CR completes the blank line", section: "9.2.5 end-of-line",
			in:   "data: a\r\r",
			want: []sse.Event{{Data: "a"}}, wantErr: io.EOF,
		},
		{
			name: "wire format stream", section: "9.2.6",
			in:   "data: {\"x\":1}\n\ndata: [DONE]\n\n",
			want: []sse.Event{{Data: `{"x":1}`}, {Data: sse.Done}}, wantErr: io.EOF,
		},
	}
	for _, tt := range tests {
		for _, mode := range []string{"whole", "one byte at a time"} {
			t.Run(tt.name+"/"+mode, func(t *testing.T) {
				var src io.Reader = strings.NewReader(tt.in)
				if mode != "whole" {
					src = iotest.OneByteReader(src)
				}
				got, err := readAll(t, sse.NewReader(src))
				assert.Equal(t, tt.want, got, "WHATWG %s: events = %#v; want %#v", tt.section, got, tt.want)
				assert.ErrorIs(t, err, tt.wantErr, "WHATWG %s: end error = %v; want %v", tt.section, err, tt.wantErr)
			})
		}
	}
}

func TestReaderRetry(t *testing.T) {
	tests := []struct {
		in   string
		want time.Duration
	}{
		// WHATWG 9.2.6 retry field: only ASCII digits set the time.
		{"retry: 1500\n\n", 1500 * time.Millisecond},
		{"retry: 1500\nretry: 2x\n\n", 1500 * time.Millisecond},
		{"retry: -5\n\n", 0},
		{"retry:\n\n", 0},
		{"retry: 99999999999999999999999\n\n", time.Duration(1<<63-1) / time.Millisecond * time.Millisecond},
	}
	for _, tt := range tests {
		r := sse.NewReader(strings.NewReader(tt.in))
		_, err := readAll(t, r)
		require.True(t, err == io.EOF, "%q: err = %v; want io.EOF", tt.in, err)
		got := r.Retry()
		assert.Equal(t, tt.want, got, "%q: Retry() = %v; want %v", tt.in, got, tt.want)
	}
}

func TestReaderSizeBound(t *testing.T) {
	tests := []struct {
		name    string
		in      string
		want    []sse.Event
		wantErr error
	}{
		{"line at the bound", "data: " + strings.Repeat("x", 10) + "\n\n", []sse.Event{{Data: strings.Repeat("x", 10)}}, io.EOF},
		{"line over the bound", "data: " + strings.Repeat("x", 11) + "\n\n", nil, sse.ErrTooLarge},
		{"unterminated long line", strings.Repeat("x", 100), nil, sse.ErrTooLarge},
		{"long comment", ":" + strings.Repeat("x", 100) + "\n", nil, sse.ErrTooLarge},
		{"data over the bound across lines", "data: 123456789\ndata: 1234567\n\n", nil, sse.ErrTooLarge},
		{"data at the bound across lines", "data: 123456789\ndata: 123456\n\n", []sse.Event{{Data: "123456789\n123456"}}, io.EOF},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r := sse.NewReaderSize(iotest.HalfReader(strings.NewReader(tt.in)), 16)
			got, err := readAll(t, r)
			assert.Equal(t, tt.want, got, "events = %#v; want %#v", got, tt.want)
			assert.ErrorIs(t, err, tt.wantErr, "error = %v; want %v", err, tt.wantErr)
			_, again := r.Next()
			assert.ErrorIs(t, again, tt.wantErr, "second Next error = %v; want the same %v", again, tt.wantErr)
		})
	}
}

func TestReaderReadError(t *testing.T) {
	boom := errors.New("connection reset")
	r := sse.NewReader(io.MultiReader(strings.NewReader("data: a\n\ndata: b"), iotest.ErrReader(boom)))
	got, err := readAll(t, r)
	want := []sse.Event{{Data: "a"}}
	assert.Equal(t, want, got, "events = %#v; want %#v", got, want)
	assert.ErrorIs(t, err, boom, "error = %v; want it to wrap %v", err, boom)
}

func TestReaderNoProgress(t *testing.T) {
	r := sse.NewReader(zeroReader{})
	_, err := r.Next()
	assert.ErrorIs(t, err, io.ErrNoProgress, "error = %v; want io.ErrNoProgress", err)
}

// zeroReader returns (0, nil) forever.
type zeroReader struct{}

func (zeroReader) Read([]byte) (int, error) { return 0, nil }

func TestEventIsDone(t *testing.T) {
	tests := []struct {
		data string
		want bool
	}{
		{"[DONE]", true},
		{" [DONE]", false},
		{"[DONE]\n", false},
		{`{"x":1}`, false},
		{"", false},
	}
	for _, tt := range tests {
		got := (sse.Event{Data: tt.data}).IsDone()
		assert.Equal(t, tt.want, got, "Event{Data: %q}.IsDone() = %v; want %v", tt.data, got, tt.want)
	}
}
