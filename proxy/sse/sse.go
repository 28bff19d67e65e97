// Package sse reads and writes Server-Sent Events, the text/event-stream
// format the completions wire format uses when a request sets "stream": true.
//
// Reader follows the parsing rules of the WHATWG HTML Living Standard,
// section 9.2 "Server-sent events" (9.2.5 "Parsing an event stream" and
// 9.2.6 "Interpreting an event stream"), with a bound on line and event size
// so a hostile upstream cannot exhaust memory. Writer emits data-only events,
// the shape the wire format uses, and flushes each one at once.
//
// Both are written by hand rather than taken from a library: the parser is
// about a hundred lines, the proxy needs exact control over the size bound,
// the end-of-stream outcome and flushing, and the SSE libraries for Go bundle
// client reconnection and server broadcast machinery the proxy does not use.
package sse

import "errors"

// Done is the data of the event that ends a stream in the completions wire
// format: "data: [DONE]".
const Done = "[DONE]"

// DefaultMaxSize is the bound Reader uses when none is given: the longest
// line, and the largest data of one event, it accepts.
const DefaultMaxSize = 8 << 20

// ErrTooLarge is returned by Reader.Next when a line, or the data of one
// event, is longer than the Reader's bound.
var ErrTooLarge = errors.New("sse: line or event larger than the limit")

// ErrInvalidField is returned by Writer.WriteEvent when an event name or id
// cannot be written as one field line.
var ErrInvalidField = errors.New("sse: invalid field value")

// Event is one dispatched event.
type Event struct {
	// Name is the value of the block's last "event" field, or "" when the
	// block had none (the standard then calls the event type "message").
	Name string
	// ID is the stream's last event ID at dispatch time: the value of the
	// most recent "id" field in this or an earlier block (WHATWG 9.2.6: the
	// last event ID buffer is not reset between events).
	ID string
	// Data is the event's data: the values of its "data" fields joined
	// with "\n".
	Data string
}

// IsDone reports whether e is the wire format's end-of-stream marker,
// "data: [DONE]".
func (e Event) IsDone() bool { return e.Data == Done }
