package sse_test

import (
	"bufio"
	"bytes"
	"errors"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/sse"
)

func TestWriterOutput(t *testing.T) {
	tests := []struct {
		name  string
		write func(w *sse.Writer) error
		want  string
	}{
		{"json data", func(w *sse.Writer) error { return w.WriteData([]byte(`{"a":1}`)) }, "data: {\"a\":1}\n\n"},
		{"empty data", func(w *sse.Writer) error { return w.WriteData(nil) }, "data: \n\n"},
		{"LF split into lines", func(w *sse.Writer) error { return w.WriteData([]byte("a\nb")) }, "data: a\ndata: b\n\n"},
		{"CRLF and CR split into lines", func(w *sse.Writer) error { return w.WriteData([]byte("a\r\nb\rc")) }, "data: a\ndata: b\ndata: c\n\n"},
		{"trailing line break", func(w *sse.Writer) error { return w.WriteData([]byte("a\n")) }, "data: a\ndata: \n\n"},
		{"leading space kept", func(w *sse.Writer) error { return w.WriteData([]byte(" a")) }, "data:  a\n\n"},
		{"done", func(w *sse.Writer) error { return w.WriteDone() }, "data: [DONE]\n\n"},
		{"named event with id", func(w *sse.Writer) error { return w.WriteEvent(sse.Event{Name: "tick", ID: "42", Data: "x"}) }, "event: tick\nid: 42\ndata: x\n\n"},
		{"comment", func(w *sse.Writer) error { return w.WriteComment("keep\nalive") }, ": keep alive\n"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var buf bytes.Buffer
			require.NoError(t, tt.write(sse.NewWriter(&buf)))
			got := buf.String()
			assert.Equal(t, tt.want, got, "wrote %q; want %q", got, tt.want)
		})
	}
}

func TestWriterInvalidField(t *testing.T) {
	for _, ev := range []sse.Event{{Name: "a\nb"}, {Name: "a\rb"}, {ID: "1\n2"}, {ID: "1\x002"}} {
		var buf bytes.Buffer
		err := sse.NewWriter(&buf).WriteEvent(ev)
		assert.ErrorIs(t, err, sse.ErrInvalidField, "WriteEvent(%#v) error = %v; want ErrInvalidField", ev, err)
		assert.Equal(t, 0, buf.Len(), "WriteEvent(%#v) wrote %q; want nothing", ev, buf.String())
	}
}

func TestWriterFlushesEachEvent(t *testing.T) {
	t.Run("bufio.Writer", func(t *testing.T) {
		var out bytes.Buffer
		bw := bufio.NewWriterSize(&out, 4096)
		w := sse.NewWriter(bw)
		require.NoError(t, w.WriteData([]byte("a")))
		got, want := out.String(), "data: a\n\n"
		assert.Equal(t, want, got, "after one event the underlying writer holds %q; want %q", got, want)
	})
	t.Run("ResponseRecorder", func(t *testing.T) {
		rec := httptest.NewRecorder()
		require.NoError(t, sse.NewWriter(rec).WriteDone())
		assert.True(t, rec.Flushed, "ResponseRecorder.Flushed = false; want true")
	})
}

// TestWriterOverHTTP proves that each event reaches a real HTTP client
// before the handler writes the next one: the handler waits for the client
// to acknowledge every event it has read.
func TestWriterOverHTTP(t *testing.T) {
	ack := make(chan struct{})
	srv := httptest.NewServer(http.HandlerFunc(func(rw http.ResponseWriter, r *http.Request) {
		rw.Header().Set("Content-Type", "text/event-stream")
		w := sse.NewWriter(rw)
		for _, d := range []string{`{"n":1}`, `{"n":2}`, "multi\nline"} {
			if !assert.NoError(t, w.WriteData([]byte(d))) {
				return
			}
			select {
			case <-ack:
			case <-r.Context().Done():
				return
			}
		}
		assert.NoError(t, w.WriteDone())
	}))
	defer srv.Close()

	resp, err := http.Get(srv.URL)
	require.NoError(t, err)
	defer resp.Body.Close()
	r := sse.NewReader(resp.Body)
	var got []string
	for {
		ev, err := r.Next()
		require.NoError(t, err, "Next: %v (events so far %q)", err, got)
		if ev.IsDone() {
			break
		}
		got = append(got, ev.Data)
		ack <- struct{}{}
	}
	want := []string{`{"n":1}`, `{"n":2}`, "multi\nline"}
	assert.Equal(t, strings.Join(want, "|"), strings.Join(got, "|"), "events = %q; want %q", got, want)
	_, err = r.Next()
	assert.True(t, err == io.EOF, "after [DONE]: %v; want io.EOF", err)
}

type failingWriter struct{ err error }

func (f failingWriter) Write([]byte) (int, error) { return 0, f.err }

func TestWriterWriteError(t *testing.T) {
	boom := errors.New("broken pipe")
	err := sse.NewWriter(failingWriter{boom}).WriteData([]byte("x"))
	assert.ErrorIs(t, err, boom, "error = %v; want it to wrap %v", err, boom)
}
