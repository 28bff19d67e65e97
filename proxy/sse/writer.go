package sse

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strings"
)

// Writer writes events to a text/event-stream and flushes each one as soon
// as it is written, so a client sees every chunk when it is produced.
//
// A Writer is not safe for concurrent use.
type Writer struct {
	w     io.Writer
	flush func() error
	buf   bytes.Buffer
}

// NewWriter returns a Writer writing to w. When w is an http.ResponseWriter,
// every event is flushed through http.NewResponseController (so wrapped
// ResponseWriters that implement Unwrap flush too; one that cannot flush is
// written without flushing). Otherwise, when w has a Flush() error or
// Flush() method (bufio.Writer, http.Flusher), that is called after each
// event.
//
// NewWriter does not set headers; a handler sets Content-Type
// "text/event-stream" before the first write.
func NewWriter(w io.Writer) *Writer {
	sw := &Writer{w: w}
	switch f := w.(type) {
	case http.ResponseWriter:
		rc := http.NewResponseController(f)
		sw.flush = func() error {
			if err := rc.Flush(); err != nil && !errors.Is(err, http.ErrNotSupported) {
				return err
			}
			return nil
		}
	case interface{ Flush() error }:
		sw.flush = f.Flush
	case http.Flusher:
		sw.flush = func() error { f.Flush(); return nil }
	default:
		sw.flush = func() error { return nil }
	}
	return sw
}

// WriteData writes one data-only event carrying data. Data containing line
// breaks (CRLF, LF or CR) is written as several "data:" lines, which a reader
// joins with "\n" (WHATWG 9.2.6), so a reader gets data back with every line
// break turned into "\n".
func (w *Writer) WriteData(data []byte) error {
	w.buf.Reset()
	writeData(&w.buf, data)
	w.buf.WriteByte('\n')
	return w.send()
}

// WriteEvent writes e with its "event" and "id" fields when they are not
// empty. It returns ErrInvalidField when Name or ID contains a line break
// or ID contains U+0000 NULL (which a reader ignores, WHATWG 9.2.6).
func (w *Writer) WriteEvent(e Event) error {
	if strings.ContainsAny(e.Name, "\r\n") {
		return fmt.Errorf("%w: event name %q has a line break", ErrInvalidField, e.Name)
	}
	if strings.ContainsAny(e.ID, "\r\n\x00") {
		return fmt.Errorf("%w: id %q has a line break or NULL", ErrInvalidField, e.ID)
	}
	w.buf.Reset()
	if e.Name != "" {
		w.buf.WriteString("event: " + e.Name + "\n")
	}
	if e.ID != "" {
		w.buf.WriteString("id: " + e.ID + "\n")
	}
	writeData(&w.buf, []byte(e.Data))
	w.buf.WriteByte('\n')
	return w.send()
}

// WriteDone writes the wire format's end-of-stream event, "data: [DONE]".
func (w *Writer) WriteDone() error { return w.WriteData([]byte(Done)) }

// WriteComment writes one comment line, which readers ignore (WHATWG
// 9.2.6); it keeps idle connections alive. Line breaks in text would end the
// comment early, so they are replaced by spaces.
func (w *Writer) WriteComment(text string) error {
	w.buf.Reset()
	w.buf.WriteString(": ")
	w.buf.WriteString(strings.NewReplacer("\r", " ", "\n", " ").Replace(text))
	w.buf.WriteByte('\n')
	return w.send()
}

func (w *Writer) send() error {
	if _, err := w.w.Write(w.buf.Bytes()); err != nil {
		return fmt.Errorf("sse: write: %w", err)
	}
	if err := w.flush(); err != nil {
		return fmt.Errorf("sse: flush: %w", err)
	}
	return nil
}

// writeData writes data as "data: " lines, one per line of data. The space
// after the colon is always written, so a line that itself starts with a
// space keeps it (readers remove only one space, WHATWG 9.2.6).
func writeData(buf *bytes.Buffer, data []byte) {
	for {
		i := bytes.IndexAny(data, "\r\n")
		if i < 0 {
			buf.WriteString("data: ")
			buf.Write(data)
			buf.WriteByte('\n')
			return
		}
		buf.WriteString("data: ")
		buf.Write(data[:i])
		buf.WriteByte('\n')
		if data[i] == '\r' && i+1 < len(data) && data[i+1] == '\n' {
			i++
		}
		data = data[i+1:]
	}
}

// SetHeaders sets the response headers of an event stream: Content-Type
// "text/event-stream; charset=utf-8" and "Cache-Control: no-cache".
func SetHeaders(h http.Header) {
	h.Set("Content-Type", "text/event-stream; charset=utf-8")
	h.Set("Cache-Control", "no-cache")
}
