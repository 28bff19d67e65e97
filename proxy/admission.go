package proxy

import (
	"errors"
	"net"
	"net/http"
	"sync/atomic"
	"time"
)

// Admission, before a request's body is read:
//
//  1. The team is decided from the request's headers alone. A missing or
//     unknown key is answered 401 at once with "Connection: close", and the
//     connection's read deadline is set to now, so net/http neither waits
//     for the rest of the body before answering (it reads up to 256 KiB of
//     an unread body to keep a connection) nor after. A client that sends
//     headers and then trickles its body costs one answer, not a
//     connection held for as long as it likes.
//  2. The team takes one of its in-flight slots (Options.MaxInFlight, or
//     its own Team.MaxInFlight); with none free the answer is 429 with
//     Retry-After: 1 and nothing is read or sent. One team's flood or slow
//     clients therefore hold at most its own slots, never another team's.
//
// Then the body is read under the server's read timeout; a body that does
// not arrive in time is answered 408. (Once a body has been read to its
// end, net/http clears the read deadline itself, so the wait for the
// upstream is not cut by it.)

// inFlight counts one team's requests in flight on this proxy.
type inFlight struct {
	limit int64 // 0: no cap
	n     atomic.Int64
}

// enter takes a slot; false when the team is at its cap.
func (f *inFlight) enter() bool {
	if f.limit <= 0 {
		return true
	}
	if f.n.Add(1) > f.limit {
		f.n.Add(-1)
		return false
	}
	return true
}

func (f *inFlight) leave() {
	if f.limit > 0 {
		f.n.Add(-1)
	}
}

// newInFlight makes the counter of each team: its own cap, else def.
func newInFlight(teams []Team, open *Team, def int) map[string]*inFlight {
	m := make(map[string]*inFlight, len(teams)+1)
	add := func(t *Team) {
		limit := def
		if t.MaxInFlight != 0 {
			limit = t.MaxInFlight
		}
		m[t.Name] = &inFlight{limit: int64(max(limit, 0))}
	}
	if open != nil {
		add(open)
	}
	for i := range teams {
		add(&teams[i])
	}
	return m
}

// enter authenticates r from its headers and takes a slot of the team's
// in-flight cap. On refusal it has answered and returns a nil team; the
// error is what was answered. Otherwise the caller calls release once the
// request is done.
func (p *Proxy) enter(w http.ResponseWriter, r *http.Request) (team *Team, keyID string, release func(), refused *apiError) {
	team, keyID, aerr := p.authenticate(r)
	if aerr != nil {
		refuseConnection(w, aerr)
		return nil, "", nil, aerr
	}
	f := p.inFlight[team.Name]
	if !f.enter() {
		e := &apiError{status: http.StatusTooManyRequests, typ: errRateLimit, code: "team_in_flight_limit", retryAfter: time.Second,
			message: "your team already has as many requests in flight on this proxy as it may (" + itoa(int(f.limit)) + "); retry when one has finished"}
		writeError(w, e)
		return nil, "", nil, e
	}
	return team, keyID, f.leave, nil
}

// refuseConnection answers e and closes the connection without reading
// what is left of the request (see the comment at the top of this file).
func refuseConnection(w http.ResponseWriter, e *apiError) {
	w.Header().Set("Connection", "close")
	writeError(w, e)
	_ = http.NewResponseController(w).SetReadDeadline(time.Now())
}

// bodyTimedOut reports whether a body read failed on the read deadline.
func bodyTimedOut(err error) bool {
	var ne net.Error
	return errors.As(err, &ne) && ne.Timeout()
}

// deadlineWriter extends the connection's write deadline before every
// write and flush, so the server's write timeout bounds each write (a
// client that stops reading) rather than the whole answer: a stream, or an
// answer that waited long for the upstream, is not cut by it.
type deadlineWriter struct {
	http.ResponseWriter
	set     func(time.Time) error
	timeout time.Duration
}

// writeDeadliner is what net/http's own ResponseWriter offers.
type writeDeadliner interface {
	SetWriteDeadline(time.Time) error
}

// withWriteTimeout wraps w in a deadlineWriter when it can set deadlines.
func withWriteTimeout(w http.ResponseWriter, d time.Duration) http.ResponseWriter {
	if d <= 0 {
		return w
	}
	wd, ok := w.(writeDeadliner)
	if !ok {
		return w
	}
	return &deadlineWriter{ResponseWriter: w, set: wd.SetWriteDeadline, timeout: d}
}

func (w *deadlineWriter) extend() { _ = w.set(time.Now().Add(w.timeout)) }

func (w *deadlineWriter) Write(b []byte) (int, error) {
	w.extend()
	return w.ResponseWriter.Write(b)
}

// FlushError extends the deadline and flushes.
func (w *deadlineWriter) FlushError() error {
	w.extend()
	return http.NewResponseController(w.ResponseWriter).Flush()
}

// Unwrap gives http.ResponseController the writer underneath.
func (w *deadlineWriter) Unwrap() http.ResponseWriter { return w.ResponseWriter }
