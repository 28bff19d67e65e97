package proxy

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strconv"
	"strings"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/cache/canon"
	"github.com/stintlab/stint/cache/runs"
)

// Header names of record/replay.
const (
	// HeaderRun names the run a call belongs to; calls with it are
	// journaled so the run can be replayed.
	HeaderRun = "Stint-Run"
	// HeaderRunMode is "record" (the default) or "replay".
	HeaderRunMode = "Stint-Run-Mode"
	// HeaderReplaySession separates concurrent replays of one run: each
	// session hands out a run's recorded answers from the first again.
	HeaderReplaySession = "Stint-Replay-Session"
	// HeaderRecordedCost, on a replayed answer, is what the call was
	// charged when the run recorded it (an estimate, like Stint-Cost-Usd;
	// the replay itself costs nothing).
	HeaderRecordedCost = "Stint-Recorded-Cost-Usd"
	// HeaderRecordedSaved, on a replayed answer, is what the cache saved
	// on the call when the run recorded it (an estimate, like
	// Stint-Saved-Usd).
	HeaderRecordedSaved = "Stint-Recorded-Saved-Usd"
)

// OutcomeReplay marks an answer served from a run's journal.
const OutcomeReplay = "replay"

// runCall is the run a request belongs to, from its headers.
type runCall struct {
	id      string
	replay  bool
	session string
}

// runHeaders reads and validates the run headers; a zero runCall means
// the request is not part of a run.
func runHeaders(h http.Header) (runCall, *apiError) {
	if h[HeaderRun] == nil && h[HeaderRunMode] == nil && h[HeaderReplaySession] == nil {
		return runCall{}, nil // the common case, decided without canonicalizing names
	}
	rc := runCall{id: h.Get(HeaderRun), session: h.Get(HeaderReplaySession)}
	mode := strings.ToLower(strings.TrimSpace(h.Get(HeaderRunMode)))
	switch mode {
	case "", "record":
	case "replay":
		rc.replay = true
	default:
		return runCall{}, badRequest("", "%s %q: want record or replay", HeaderRunMode, mode)
	}
	if rc.id == "" {
		if mode != "" || rc.session != "" {
			return runCall{}, badRequest("", "%s and %s need a %s header", HeaderRunMode, HeaderReplaySession, HeaderRun)
		}
		return rc, nil
	}
	if err := runs.ValidID(rc.id); err != nil {
		return runCall{}, badRequest("", "%s: %v", HeaderRun, err)
	}
	if rc.session != "" {
		if err := runs.ValidID(rc.session); err != nil {
			return runCall{}, badRequest("", "%s: %v", HeaderReplaySession, err)
		}
	}
	return rc, nil
}

// runKey identifies a request within a run: its endpoint and the canonical
// form of its whole body (integers a double cannot hold keep their digits),
// stream flag included, so a replayed call gets the very bytes its recorded
// twin received.
func runKey(ep endpoint, body []byte) (string, error) {
	cz := canonicalizers.Get().(*canon.Canonicalizer)
	c, err := cz.Append(nil, body)
	canonicalizers.Put(cz)
	if err != nil {
		return "", err
	}
	h := sha256.New()
	fmt.Fprintf(h, "stint-run-call\n%s\n", ep)
	h.Write(c)
	return hex.EncodeToString(h.Sum(nil)), nil
}

func runsOff() *apiError {
	return &apiError{status: http.StatusNotImplemented, typ: errServer, code: "runs_off", message: "this proxy keeps no run journal"}
}

// serveReplay answers a call from its run's journal, never from upstream.
// The n-th identical call of a replay session gets the n-th recorded
// answer; past the recorded count it wraps around to the first, so a
// replay that is run again in the same session replays the same answers.
func (p *Proxy) serveReplay(w http.ResponseWriter, r *http.Request, ll *logLine, team *Team, rc runCall, ep endpoint, body []byte) *apiError {
	ctx := r.Context()
	key, err := runKey(ep, body)
	if err != nil {
		return badRequest("", "request cannot be canonicalized: %v", err)
	}
	have, err := p.runs.Count(ctx, team.Name, rc.id, key)
	if err != nil {
		return journalError(err)
	}
	if have == 0 {
		if _, err := p.runs.Summary(ctx, team.Name, rc.id); errors.Is(err, runs.ErrNotFound) {
			return &apiError{status: http.StatusNotFound, typ: errInvalidRequest, code: "run_not_found",
				message: fmt.Sprintf("your team has no run %q to replay", rc.id)}
		} else if err != nil {
			return journalError(err)
		}
		return &apiError{status: http.StatusConflict, typ: errInvalidRequest, code: "replay_miss",
			message: fmt.Sprintf("run %q never made this request (request key %s); a replay answers only calls the run recorded", rc.id, key)}
	}
	occ := (p.cursor.Next(team.Name, rc.id, rc.session, key)-1)%have + 1
	e, a, err := p.runs.Lookup(ctx, team.Name, rc.id, key, occ)
	if err != nil {
		return journalError(err)
	}
	ll.outcome, ll.status = OutcomeReplay, a.Status
	h := w.Header()
	h.Set("Content-Type", a.ContentType)
	h.Set("X-Content-Type-Options", "nosniff") // a browser takes the answer for what it says it is
	h.Set(HeaderCacheStatus, CacheStatus{Hit: true, Detail: DetailReplay}.String())
	h.Set(HeaderRun, rc.id)
	if p.spend != nil {
		h.Set(HeaderCost, usd(0))
	}
	h.Set(HeaderRecordedCost, usd(budget.Nanos(e.CostNanos)))
	h.Set(HeaderRecordedSaved, usd(budget.Nanos(e.SavedNanos)))
	if e.Stream {
		h.Set("Cache-Control", "no-cache")
	}
	w.WriteHeader(a.Status)
	_, _ = w.Write(a.Body)
	return nil
}

func journalError(err error) *apiError {
	return &apiError{status: http.StatusServiceUnavailable, typ: errServer, code: "run_journal_unavailable",
		message: "the run journal cannot be read or written: " + err.Error()}
}

// doneEvent ends a stream of the wire format.
var doneEvent = []byte("data: [DONE]")

// runRecorder captures the answer of a recorded call so it can be
// journaled before the client has it all: a plain answer is held whole
// until the journal entry is durable; a stream is passed on as it comes,
// except for its final "data: [DONE]" event, held until then.
type runRecorder struct {
	w      http.ResponseWriter
	status int
	stream bool
	body   bytes.Buffer // every byte of the answer
	held   []byte       // stream bytes not passed on yet
}

func (rr *runRecorder) Header() http.Header { return rr.w.Header() }

func (rr *runRecorder) WriteHeader(status int) {
	if rr.status != 0 {
		return
	}
	rr.status = status
	rr.stream = status == http.StatusOK && strings.HasPrefix(rr.w.Header().Get("Content-Type"), "text/event-stream")
	if rr.stream || status != http.StatusOK {
		rr.w.WriteHeader(status) // errors are not recorded; pass them on
	}
}

func (rr *runRecorder) Write(b []byte) (int, error) {
	if rr.status == 0 {
		rr.WriteHeader(http.StatusOK)
	}
	if rr.status != http.StatusOK {
		return rr.w.Write(b)
	}
	rr.body.Write(b)
	if !rr.stream {
		return len(b), nil
	}
	if len(rr.held) == 0 {
		i := bytes.Index(b, doneEvent)
		if i < 0 {
			return rr.w.Write(b)
		}
		if _, err := rr.w.Write(b[:i]); err != nil {
			return 0, err
		}
		b = b[i:]
	}
	rr.held = append(rr.held, b...)
	return len(b), nil
}

// FlushError passes a stream's flush on; a held plain answer has nothing
// to flush.
func (rr *runRecorder) FlushError() error {
	if !rr.stream {
		return nil
	}
	return http.NewResponseController(rr.w).Flush()
}

// finish journals a successful answer and then releases it: the body of a
// plain answer, the end of a stream. If the journal refuses it, a plain
// answer becomes a 503 and a stream ends without its final event, so the
// client never takes an unrecorded answer for a recorded one.
func (rr *runRecorder) finish(record func(runs.Answer) error) {
	if rr.status != http.StatusOK {
		return
	}
	a := runs.Answer{Status: rr.status, ContentType: rr.w.Header().Get("Content-Type"), Body: rr.body.Bytes(), Stream: rr.stream}
	err := record(a)
	switch {
	case err != nil && !rr.stream:
		h := rr.w.Header()
		for _, k := range []string{HeaderCost, HeaderSaved, HeaderBudgetLeft, "Content-Length"} {
			h.Del(k)
		}
		if errors.Is(err, runs.ErrQuota) {
			writeError(rr.w, quotaError(err))
			return
		}
		writeError(rr.w, journalError(err))
	case err != nil:
		// Leave the stream unfinished.
	case rr.stream:
		_, _ = rr.w.Write(rr.held)
	default:
		rr.w.WriteHeader(rr.status)
		_, _ = rr.w.Write(a.Body)
	}
}

// recordCall journals one answered call of a run. Its cost and saving are
// read back from the spend headers the answer carries.
func (p *Proxy) recordCall(ctx context.Context, team *Team, rc runCall, ep endpoint, body []byte, h http.Header, a runs.Answer) error {
	key, err := runKey(ep, body)
	if err != nil {
		return err
	}
	outcome := CacheOutcome(h)
	e := runs.Entry{
		Key: key, Outcome: outcome, Model: modelOf(body), Time: p.now(),
		Upstream:  outcome == OutcomeMiss || outcome == OutcomeBypass || outcome == OutcomePartial,
		CostNanos: headerNanos(h, HeaderCost), SavedNanos: headerNanos(h, HeaderSaved),
	}
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), writeTimeout)
	defer cancel()
	_, err = p.runs.Record(ctx, team.Name, rc.id, e, a)
	return err
}

func headerNanos(h http.Header, name string) int64 {
	f, err := strconv.ParseFloat(h.Get(name), 64)
	if err != nil {
		return 0
	}
	n, err := budget.FromUSD(f)
	if err != nil {
		return 0
	}
	return int64(n)
}

func modelOf(body []byte) string {
	var m struct {
		Model string `json:"model"`
	}
	_ = json.Unmarshal(body, &m)
	return m.Model
}

// runCtxKey carries a recorded call's run id in its context.
type runCtxKey struct{}

func withRun(ctx context.Context, run string) context.Context {
	return context.WithValue(ctx, runCtxKey{}, run)
}

// runOf returns the run id ctx carries, or "".
func runOf(ctx context.Context) string {
	s, _ := ctx.Value(runCtxKey{}).(string)
	return s
}
