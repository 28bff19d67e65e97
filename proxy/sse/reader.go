package sse

import (
	"bytes"
	"fmt"
	"io"
	"strconv"
	"time"
)

// readChunk is the size of each read from the underlying reader.
const readChunk = 32 << 10

// maxEmptyReads is how many (0, nil) reads in a row are taken as a broken
// reader, as bufio does.
const maxEmptyReads = 100

// Reader parses an event stream incrementally. Each call to Next returns the
// next dispatched event.
//
// At the end of the input, Next returns io.EOF when the stream ended cleanly:
// at a line boundary with nothing pending since the last blank line except
// comment lines. When the input ends mid-line or after field lines that no
// blank line dispatched, the pending event is discarded, as WHATWG 9.2.6
// requires ("if the file ends in the middle of an event, before the final
// empty line, the incomplete event is not dispatched"), and Next returns an
// error wrapping io.ErrUnexpectedEOF so a truncated upstream stream is not
// mistaken for a finished one. Other read errors are returned wrapped. After
// any error, Next keeps returning it.
//
// Unlike a browser, Reader does not replace invalid UTF-8 with U+FFFD: data
// bytes pass through unchanged, so JSON payloads reach their decoder intact.
// A leading byte-order mark is dropped (WHATWG 9.2.5).
//
// A Reader is not safe for concurrent use.
type Reader struct {
	r   io.Reader
	max int

	buf        []byte // read buffer; buf[start:end] is unread
	start, end int
	line       []byte // a line that spans reads, collected so far
	skipLF     bool   // the last terminator was CR: a following LF belongs to it
	first      bool   // no line returned yet (for the byte-order mark)
	err        error  // sticky error

	data    []byte // data buffer
	name    string // event type buffer
	lastID  string // last event ID buffer
	retry   time.Duration
	pending bool // a field line was seen since the last blank line
}

// NewReader returns a Reader reading from r with the default bound,
// DefaultMaxSize.
func NewReader(r io.Reader) *Reader { return NewReaderSize(r, DefaultMaxSize) }

// NewReaderSize returns a Reader reading from r that rejects, with
// ErrTooLarge, any line longer than max bytes (terminator excluded) and any
// event whose data would exceed max bytes. A max of zero or less means
// DefaultMaxSize.
func NewReaderSize(r io.Reader, max int) *Reader {
	if max <= 0 {
		max = DefaultMaxSize
	}
	return &Reader{r: r, max: max, buf: make([]byte, min(readChunk, max+2)), first: true}
}

// Retry returns the reconnection time most recently set by a "retry" field,
// or 0 when the stream set none (WHATWG 9.2.6).
func (r *Reader) Retry() time.Duration { return r.retry }

// Next returns the next event. See the Reader documentation for what it
// returns at the end of the input.
func (r *Reader) Next() (Event, error) {
	if r.err != nil {
		return Event{}, r.err
	}
	for {
		line, err := r.readLine()
		if err != nil {
			r.err = err
			return Event{}, err
		}
		if len(line) == 0 {
			// WHATWG 9.2.6: "If the line is empty (a blank line):
			// dispatch the event".
			ev, ok := r.dispatch()
			if ok {
				return ev, nil
			}
			continue
		}
		if err := r.processLine(line); err != nil {
			r.err = err
			return Event{}, err
		}
	}
}

// dispatch applies WHATWG 9.2.6 "dispatch the event": the last event ID is
// kept, an empty data buffer dispatches nothing, one trailing LF is removed,
// and the data and event type buffers are reset.
func (r *Reader) dispatch() (Event, bool) {
	r.pending = false
	if len(r.data) == 0 {
		r.name = ""
		return Event{}, false
	}
	data := r.data[:len(r.data)-1] // every data line appended a trailing LF
	ev := Event{Name: r.name, ID: r.lastID, Data: string(data)}
	r.data = r.data[:0]
	r.name = ""
	return ev, true
}

// processLine handles one non-empty line (WHATWG 9.2.6).
func (r *Reader) processLine(line []byte) error {
	if line[0] == ':' {
		// "If the line starts with a U+003A COLON character (:)
		// Ignore the line."
		return nil
	}
	r.pending = true
	field, value := line, []byte(nil)
	if i := bytes.IndexByte(line, ':'); i >= 0 {
		// "Collect the characters on the line before the first U+003A
		// COLON character (:), and let field be that string. Collect the
		// characters on the line after the first U+003A COLON character
		// (:), and let value be that string. If value starts with a
		// U+0020 SPACE character, remove it from value."
		field, value = line[:i], line[i+1:]
		if len(value) > 0 && value[0] == ' ' {
			value = value[1:]
		}
	}
	// Otherwise "the string is not empty but does not contain a U+003A
	// COLON character (:)": the whole line is the field, value is empty.
	switch string(field) {
	case "event":
		r.name = string(value)
	case "data":
		if len(r.data)+len(value)+1 > r.max+1 {
			return fmt.Errorf("%w: event data over %d bytes", ErrTooLarge, r.max)
		}
		r.data = append(r.data, value...)
		r.data = append(r.data, '\n')
	case "id":
		// "If the field value does not contain U+0000 NULL, then set
		// the last event ID buffer to the field value. Otherwise, ignore
		// the field."
		if bytes.IndexByte(value, 0) < 0 {
			r.lastID = string(value)
		}
	case "retry":
		// "If the field value consists of only ASCII digits, then
		// interpret the field value as an integer in base ten, and set
		// the event stream's reconnection time to that integer.
		// Otherwise, ignore the field."
		if ms, ok := parseDigits(value); ok {
			r.retry = time.Duration(ms) * time.Millisecond
		}
	default:
		// "Otherwise: The field is ignored."
	}
	return nil
}

// parseDigits parses a non-empty run of ASCII digits. Values too large for a
// duration are clamped.
func parseDigits(b []byte) (int64, bool) {
	if len(b) == 0 {
		return 0, false
	}
	for _, c := range b {
		if c < '0' || c > '9' {
			return 0, false
		}
	}
	n, err := strconv.ParseInt(string(b), 10, 64)
	if err != nil || n > int64(1<<63-1)/int64(time.Millisecond) {
		n = int64(1<<63-1) / int64(time.Millisecond)
	}
	return n, true
}

// readLine returns the next line without its terminator. Lines end in
// CRLF, LF or CR (WHATWG 9.2.5 "end-of-line"). The returned slice is valid
// until the next call. At the end of the input it returns io.EOF after a
// clean end, or an error wrapping io.ErrUnexpectedEOF.
func (r *Reader) readLine() ([]byte, error) {
	r.line = r.line[:0]
	partial := false
	for {
		if r.start < r.end {
			if r.skipLF {
				r.skipLF = false
				if r.buf[r.start] == '\n' {
					r.start++
					continue
				}
			}
			rest := r.buf[r.start:r.end]
			i := bytes.IndexAny(rest, "\r\n")
			if i < 0 {
				if len(r.line)+len(rest) > r.max {
					return nil, fmt.Errorf("%w: line over %d bytes", ErrTooLarge, r.max)
				}
				r.line = append(r.line, rest...)
				partial = true
				r.start = r.end
				continue
			}
			if len(r.line)+i > r.max {
				return nil, fmt.Errorf("%w: line over %d bytes", ErrTooLarge, r.max)
			}
			piece := rest[:i]
			r.skipLF = rest[i] == '\r'
			r.start += i + 1
			var line []byte
			if len(r.line) == 0 {
				line = piece
			} else {
				r.line = append(r.line, piece...)
				line = r.line
			}
			if r.first {
				r.first = false
				line = bytes.TrimPrefix(line, []byte("\uFEFF"))
			}
			return line, nil
		}
		if err := r.fill(); err != nil {
			if err != io.EOF {
				return nil, fmt.Errorf("sse: read: %w", err)
			}
			if partial || r.pending {
				return nil, fmt.Errorf("sse: stream ended mid-event: %w", io.ErrUnexpectedEOF)
			}
			return nil, io.EOF
		}
	}
}

// fill reads more input into the empty buffer.
func (r *Reader) fill() error {
	r.start, r.end = 0, 0
	for range maxEmptyReads {
		n, err := r.r.Read(r.buf)
		if n > 0 {
			r.end = n
			return nil
		}
		if err != nil {
			return err
		}
	}
	return io.ErrNoProgress
}
