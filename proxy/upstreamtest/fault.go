package upstreamtest

import (
	"encoding/base64"
	"encoding/json"
	"fmt"
	"math"
	"net"
	"net/http"
	"strconv"
	"strings"
	"time"

	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/wire"
)

// Fault is what an injected failure does to one call. Its parts apply in
// order: Delay, then Hang, Reset or Status (the first one set), and Cut
// applies to the answer that is then given. A Fault with only Delay (or
// only Cut) answers normally after it.
type Fault struct {
	// Path limits the fault to calls to this path (PathCompletions,
	// PathChat, PathModels); empty means every call.
	Path string
	// Delay holds the call this long before anything else happens
	// (returning early if the client gives up).
	Delay time.Duration
	// Hang holds the call until the client gives up (its request context
	// ends) or the server closes, and then answers nothing.
	Hang bool
	// Reset drops the TCP connection without an answer (a hijacked
	// connection closed with SO_LINGER 0, so the client sees a reset).
	Reset bool
	// Status answers with this status and Body instead of the model.
	Status int
	// Body is the answer's body for Status; empty means an error body in
	// the wire format's shape.
	Body string
	// RetryAfter, when set, is sent as the Retry-After header with Status
	// (RFC 9110 section 10.2.3: seconds or an HTTP date).
	RetryAfter string
	// Cut, when positive, cuts the answer short and drops the connection:
	// a streamed answer after Cut events (without "data: [DONE]"), any
	// other answer after Cut bytes of its body.
	Cut int
	// EchoAuth, with Status, makes the answer repeat the Authorization
	// header the call carried, as some APIs do in their errors: in the
	// header HeaderReceivedAuth, and in the body. With Body empty the body
	// is a wire-format error whose message quotes the header as received,
	// in standard and URL-safe base64, and as the base64 of a Basic
	// credential "apikey:<token>"; with Body set, each "{{authorization}}"
	// in Body is replaced by the header as received.
	EchoAuth bool
}

// HeaderReceivedAuth carries the Authorization header an EchoAuth fault
// received.
const HeaderReceivedAuth = "X-Received-Authorization"

// AuthPlaceholder is what an EchoAuth fault replaces in Fault.Body.
const AuthPlaceholder = "{{authorization}}"

// faultRule is a queued fault: for the next remaining calls, or for a
// share ratio of the matching calls.
type faultRule struct {
	fault     Fault
	remaining int     // FailNext
	ratio     float64 // FailRatio, when > 0
	seen      int     // matching calls seen by a ratio rule
}

// FailNext makes the next n calls matching f.Path fail with f. Rules queue
// in the order they are added; each call takes the first rule that matches.
func (s *Server) FailNext(n int, f Fault) {
	if n <= 0 {
		return
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	s.faults = append(s.faults, &faultRule{fault: f, remaining: n})
}

// FailRatio makes a share ratio (0 to 1) of the calls matching f.Path fail
// with f, spread evenly and deterministically: of the first k matching
// calls, floor(k*ratio) fail (with ratio 0.5, the 2nd, 4th, 6th, ...). The
// rule stays until ClearFaults or Reset.
func (s *Server) FailRatio(ratio float64, f Fault) {
	if !(ratio > 0) {
		return
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	s.faults = append(s.faults, &faultRule{fault: f, ratio: min(ratio, 1)})
}

// ClearFaults removes every pending fault.
func (s *Server) ClearFaults() {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.faults = nil
}

// nextFault takes the fault for a call to path, if any.
func (s *Server) nextFault(path string) *Fault {
	s.mu.Lock()
	defer s.mu.Unlock()
	for i, r := range s.faults {
		if r.fault.Path != "" && r.fault.Path != path {
			continue
		}
		if r.ratio > 0 {
			r.seen++
			if math.Floor(float64(r.seen)*r.ratio) > math.Floor(float64(r.seen-1)*r.ratio) {
				f := r.fault
				return &f
			}
			continue
		}
		r.remaining--
		if r.remaining <= 0 {
			s.faults = append(s.faults[:i:i], s.faults[i+1:]...)
		}
		f := r.fault
		return &f
	}
	return nil
}

// applyFault performs f and reports whether the call should go on to be
// answered normally.
func (s *Server) applyFault(w http.ResponseWriter, r *http.Request, f *Fault) bool {
	if f.Delay > 0 {
		t := time.NewTimer(f.Delay)
		defer t.Stop()
		select {
		case <-t.C:
		case <-r.Context().Done():
			return false
		case <-s.closing:
			return false
		}
	}
	switch {
	case f.Hang:
		select {
		case <-r.Context().Done():
		case <-s.closing:
		}
		return false
	case f.Reset:
		resetConn(w)
		return false
	case f.Status != 0:
		if f.RetryAfter != "" {
			w.Header().Set("Retry-After", f.RetryAfter)
		}
		body := []byte(f.Body)
		auth := r.Header.Get("Authorization")
		if f.EchoAuth {
			w.Header().Set(HeaderReceivedAuth, auth)
			body = []byte(strings.ReplaceAll(f.Body, AuthPlaceholder, auth))
		}
		if f.Body == "" {
			e := faultError(f.Status)
			if f.EchoAuth {
				e.Message = echoMessage(auth)
			}
			body, _ = json.Marshal(wire.ErrorBody{Error: e})
			w.Header().Set("Content-Type", "application/json")
		}
		out := responder{w: w, cut: f.Cut}
		out.raw(f.Status, body)
		return false
	}
	return true
}

// echoMessage is an error message that repeats the received Authorization
// header in the forms APIs are seen to use.
func echoMessage(auth string) string {
	token := strings.TrimSpace(strings.TrimPrefix(auth, "Bearer "))
	return fmt.Sprintf("Incorrect API key provided. Received Authorization %q (base64 %s, url-safe %s; as Basic: %s).",
		auth, base64.StdEncoding.EncodeToString([]byte(auth)), base64.URLEncoding.EncodeToString([]byte(auth)),
		base64.StdEncoding.EncodeToString([]byte("apikey:"+token)))
}

// faultError is the default error body of an injected status.
func faultError(status int) wire.ErrorDetail {
	typ := "invalid_request_error"
	var code wire.ErrorCode
	switch {
	case status == http.StatusTooManyRequests:
		typ = "rate_limit_error"
		code = "rate_limit_exceeded"
	case status >= 500:
		typ = "server_error"
	}
	return wire.ErrorDetail{
		Message: fmt.Sprintf("injected fault: %d %s", status, http.StatusText(status)),
		Type:    typ,
		Code:    code,
	}
}

// resetConn drops the connection under w with a TCP reset.
func resetConn(w http.ResponseWriter) {
	conn, _, err := http.NewResponseController(w).Hijack()
	if err != nil {
		// Not hijackable (HTTP/2): abort the stream instead.
		panic(http.ErrAbortHandler)
	}
	if tc, ok := conn.(*net.TCPConn); ok {
		tc.SetLinger(0)
	}
	conn.Close()
}

// responder writes answers, cutting them short when cut is positive.
type responder struct {
	w   http.ResponseWriter
	cut int
}

func (o responder) json(status int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		// Only the fake's own types are marshalled; this cannot fail.
		panic(fmt.Sprintf("upstreamtest: marshal: %v", err))
	}
	o.w.Header().Set("Content-Type", "application/json")
	o.raw(status, b)
}

func (o responder) error(e *apiError) {
	o.json(e.status, wire.ErrorBody{Error: e.body})
}

func (o responder) raw(status int, body []byte) {
	o.w.Header().Set("Content-Length", strconv.Itoa(len(body)))
	o.w.WriteHeader(status)
	if o.cut > 0 && o.cut < len(body) {
		o.w.Write(body[:o.cut])
		http.NewResponseController(o.w).Flush()
		panic(http.ErrAbortHandler)
	}
	o.w.Write(body)
}

// stream starts an event-stream answer.
func (o responder) stream() *eventStream {
	sse.SetHeaders(o.w.Header())
	o.w.WriteHeader(http.StatusOK)
	return &eventStream{w: sse.NewWriter(o.w), cut: o.cut}
}

// eventStream writes the events of a streamed answer. A write error means
// the client has gone; the remaining events are dropped.
type eventStream struct {
	w      *sse.Writer
	cut    int
	events int
	err    error
}

func (e *eventStream) send(v any) {
	if e.err != nil {
		return
	}
	if e.cut > 0 && e.events >= e.cut {
		panic(http.ErrAbortHandler)
	}
	b, err := json.Marshal(v)
	if err != nil {
		panic(fmt.Sprintf("upstreamtest: marshal: %v", err))
	}
	e.events++
	e.err = e.w.WriteData(b)
}

func (e *eventStream) done() {
	if e.err != nil {
		return
	}
	if e.cut > 0 && e.events >= e.cut {
		panic(http.ErrAbortHandler)
	}
	e.err = e.w.WriteDone()
}
