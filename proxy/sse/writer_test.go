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
			if err := tt.write(sse.NewWriter(&buf)); err != nil {
				t.Fatal(err)
			}
			if got := buf.String(); got != tt.want {
				t.Errorf("wrote %q; want %q", got, tt.want)
			}
		})
	}
}

func TestWriterInvalidField(t *testing.T) {
	for _, ev := range []sse.Event{{Name: "a\nb"}, {Name: "a\rb"}, {ID: "1\n2"}, {ID: "1\x002"}} {
		var buf bytes.Buffer
		if err := sse.NewWriter(&buf).WriteEvent(ev); !errors.Is(err, sse.ErrInvalidField) {
			t.Errorf("WriteEvent(%#v) error = %v; want ErrInvalidField", ev, err)
		}
		if buf.Len() != 0 {
			t.Errorf("WriteEvent(%#v) wrote %q; want nothing", ev, buf.String())
		}
	}
}

func TestWriterFlushesEachEvent(t *testing.T) {
	t.Run("bufio.Writer", func(t *testing.T) {
		var out bytes.Buffer
		bw := bufio.NewWriterSize(&out, 4096)
		w := sse.NewWriter(bw)
		if err := w.WriteData([]byte("a")); err != nil {
			t.Fatal(err)
		}
		if got, want := out.String(), "data: a\n\n"; got != want {
			t.Errorf("after one event the underlying writer holds %q; want %q", got, want)
		}
	})
	t.Run("ResponseRecorder", func(t *testing.T) {
		rec := httptest.NewRecorder()
		if err := sse.NewWriter(rec).WriteDone(); err != nil {
			t.Fatal(err)
		}
		if !rec.Flushed {
			t.Error("ResponseRecorder.Flushed = false; want true")
		}
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
			if err := w.WriteData([]byte(d)); err != nil {
				t.Error(err)
				return
			}
			select {
			case <-ack:
			case <-r.Context().Done():
				return
			}
		}
		if err := w.WriteDone(); err != nil {
			t.Error(err)
		}
	}))
	defer srv.Close()

	resp, err := http.Get(srv.URL)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	r := sse.NewReader(resp.Body)
	var got []string
	for {
		ev, err := r.Next()
		if err != nil {
			t.Fatalf("Next: %v (events so far %q)", err, got)
		}
		if ev.IsDone() {
			break
		}
		got = append(got, ev.Data)
		ack <- struct{}{}
	}
	if want := []string{`{"n":1}`, `{"n":2}`, "multi\nline"}; strings.Join(got, "|") != strings.Join(want, "|") {
		t.Errorf("events = %q; want %q", got, want)
	}
	if _, err := r.Next(); err != io.EOF {
		t.Errorf("after [DONE]: %v; want io.EOF", err)
	}
}

type failingWriter struct{ err error }

func (f failingWriter) Write([]byte) (int, error) { return 0, f.err }

func TestWriterWriteError(t *testing.T) {
	boom := errors.New("broken pipe")
	if err := sse.NewWriter(failingWriter{boom}).WriteData([]byte("x")); !errors.Is(err, boom) {
		t.Errorf("error = %v; want it to wrap %v", err, boom)
	}
}
