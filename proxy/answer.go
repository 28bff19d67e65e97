package proxy

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"sync"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/cache/canon"
	"github.com/stintlab/stint/proxy/wire"
)

// answer writes the reply to a request whose every prompt now has an answer.
// full, when set, is the upstream's whole answer for the whole request and is
// sent unchanged.
func (p *Proxy) answer(w http.ResponseWriter, ll *logLine, req *request, items []item, full []byte, outcome string, fig spendFigures) {
	parts := make([]served, len(items))
	for i := range items {
		parts[i] = *items[i].hit
	}
	body, u := full, wire.Usage{}
	if body == nil {
		var err error
		body, u, err = mergeAnswers(req, parts)
		if err != nil {
			ll.status = http.StatusBadGateway
			writeError(w, &apiError{status: http.StatusBadGateway, typ: errCache, code: "bad_stored_answer", message: err.Error()})
			return
		}
	} else {
		_, u = mergeUsage(parts)
	}
	ll.usage = u
	ll.status = http.StatusOK
	if req.promptsArray {
		w.Header().Set(HeaderCachedPrompt, fmt.Sprintf("%d/%d", ll.hits, ll.prompts))
	}
	p.spendHeaders(context.Background(), w.Header(), fig.team, fig.cost, fig.saved)
	if req.stream {
		if err := writeStream(w, req.endpoint, body, req.includeUsage, p.cacheStatusOf(ll, outcome, http.StatusOK).String()); err != nil {
			p.log.Warn("cannot stream answer", "err", err)
		}
		return
	}
	// The names are canonical already, so the map is written directly
	// rather than through Header.Set, which canonicalizes each one again.
	h := w.Header()
	h["Content-Type"] = []string{"application/json"}
	h["Content-Length"] = []string{strconv.Itoa(len(body))}
	p.setCacheStatus(h, ll, outcome, http.StatusOK)
	w.WriteHeader(http.StatusOK)
	_, _ = w.Write(body)
}

func mergeUsage(parts []served) (int, wire.Usage) {
	var u wire.Usage
	for _, s := range parts {
		u = u.Add(s.usage)
	}
	return len(parts), u
}

// mergeAnswers joins single-prompt answers into the answer for the whole
// request: choices renumbered prompt*n + j in prompt order, usage summed,
// the other top-level fields taken from the first answer.
func mergeAnswers(req *request, parts []served) ([]byte, wire.Usage, error) {
	if len(parts) == 1 {
		return parts[0].body, parts[0].usage, nil
	}
	var env map[string]json.RawMessage
	var all []json.RawMessage
	var total wire.Usage
	for i, s := range parts {
		var e map[string]json.RawMessage
		if err := json.Unmarshal(s.body, &e); err != nil {
			return nil, wire.Usage{}, fmt.Errorf("stored answer %d: %w", i, err)
		}
		if env == nil {
			env = e
		}
		var choices []map[string]json.RawMessage
		if err := json.Unmarshal(e["choices"], &choices); err != nil {
			return nil, wire.Usage{}, fmt.Errorf("stored answer %d choices: %w", i, err)
		}
		for _, ch := range choices {
			var j int
			if err := json.Unmarshal(ch["index"], &j); err != nil {
				return nil, wire.Usage{}, fmt.Errorf("stored answer %d: bad choice index", i)
			}
			ch["index"] = json.RawMessage(strconv.Itoa(i*req.n + j))
			all = append(all, mustMarshal(ch))
		}
		total = total.Add(s.usage)
	}
	env["choices"] = mustMarshal(all)
	env["usage"] = mustMarshal(total)
	b, err := json.Marshal(env)
	return b, total, err
}

// writeUpstreamError passes an upstream's error answer through (status, body
// and the headers a client acts on), or maps a transport failure to 502/504.
func (p *Proxy) writeUpstreamError(w http.ResponseWriter, ll *logLine, ue *upstreamError) {
	if ue.status == 0 {
		e := ue.apiError()
		ll.status = e.status
		writeError(w, e)
		return
	}
	ll.status = ue.status
	h := w.Header()
	for _, name := range []string{"Content-Type", "Retry-After"} {
		if v := ue.header.Get(name); v != "" {
			h.Set(name, v)
		}
	}
	p.setCacheStatus(h, ll, ll.outcome, ue.status)
	h.Set("Content-Length", strconv.Itoa(len(ue.body)))
	w.WriteHeader(ue.status)
	_, _ = w.Write(ue.body)
}

// forward sends a request that is not cacheable upstream as it came and
// relays the answer byte for byte. Under spend control the call is admitted
// first and settled from the answer's usage; a stream is then relayed event
// by event with the usage chunk requested, so it can be settled.
func (p *Proxy) forward(w http.ResponseWriter, r *http.Request, ll *logLine, team *Team, keyID string, up *Upstream, req *request) {
	if p.spend != nil {
		p.forwardAccounted(w, r, ll, team, keyID, up, req)
		return
	}
	ctx := r.Context()
	start := p.now()
	x, err := p.send(ctx, ctx, up, req.model, req.endpoint, req.raw, nil)
	if err != nil {
		p.forwardFailed(w, ll, err)
		return
	}
	resp := x.resp
	var readErr error
	defer func() { x.finish(readErr) }()
	defer resp.Body.Close()
	h := w.Header()
	for _, name := range []string{"Content-Type", "Content-Length"} {
		if v := resp.Header.Get(name); v != "" {
			h.Set(name, v)
		}
	}
	p.setCacheStatus(h, ll, OutcomeBypass, resp.StatusCode)
	w.WriteHeader(resp.StatusCode)
	ll.status = resp.StatusCode
	buf := make([]byte, 32<<10)
	rc := http.NewResponseController(w)
	for {
		n, rerr := resp.Body.Read(buf)
		if n > 0 {
			if _, werr := w.Write(buf[:n]); werr != nil {
				break
			}
			if req.stream {
				_ = rc.Flush()
			}
		}
		if rerr != nil {
			if rerr != io.EOF {
				ll.upstream = p.now().Sub(start)
				readErr = &upstreamError{err: rerr}
				panic(http.ErrAbortHandler)
			}
			break
		}
	}
	ll.upstream = p.now().Sub(start)
	p.metrics.upstreamSeconds.WithLabelValues(up.Name, string(req.endpoint)).Observe(ll.upstream.Seconds())
}

func (p *Proxy) forwardFailed(w http.ResponseWriter, ll *logLine, err error) {
	var ue *upstreamError
	if errors.As(err, &ue) {
		p.writeUpstreamError(w, ll, ue)
		return
	}
	ll.status = http.StatusBadGateway
	writeError(w, &apiError{status: http.StatusBadGateway, typ: errUpstream, message: err.Error()})
}

// forwardAccounted is forward under spend control.
func (p *Proxy) forwardAccounted(w http.ResponseWriter, r *http.Request, ll *logLine, team *Team, keyID string, up *Upstream, req *request) {
	items := make([]item, len(req.prompts))
	for i, pr := range req.prompts {
		items[i].prompt = pr
	}
	// Settle even if the client leaves: the provider bills either way.
	ctx, cancel := context.WithTimeout(context.WithoutCancel(r.Context()), up.timeout())
	defer cancel()
	body, err := upstreamBody(req, nil, req.stream)
	if err != nil {
		e := badRequest("", "cannot forward the request: %v", err)
		ll.status = e.status
		writeError(w, e)
		return
	}
	admit := func(ctx context.Context, u *Upstream) (*guard.Ticket, error) {
		return p.spend.Admit(ctx, spendCall(ctx, team, keyID, u, req, items, nil))
	}
	start := p.now()
	x, err := p.send(r.Context(), ctx, up, req.model, req.endpoint, body, admit)
	if err != nil {
		var ae *admitError
		if errors.As(err, &ae) {
			e := spendError(ae.err)
			ll.status = e.status
			writeError(w, e)
			return
		}
		p.forwardFailed(w, ll, err)
		return
	}
	ticket, resp := x.ticket, x.resp
	var readErr error
	defer func() { x.finish(readErr) }()
	defer resp.Body.Close()
	res := &flightResult{}
	if req.stream {
		_, u, hasUsage, rerr := p.relay(w, resp, req, p.cacheStatusOf(ll, OutcomeBypass, http.StatusOK).String(), false)
		ll.status, ll.usage = http.StatusOK, u
		if hasUsage {
			res.items = []served{{usage: u}}
			rerr = nil
		}
		readErr = rerr
		p.settle(ctx, ticket, team.Name, res, rerr, budget.Bypass)
		res.cost += x.failedCost
		p.spendHeaders(ctx, w.Header(), team.Name, res.cost, 0)
		ll.upstream = p.now().Sub(start)
		return
	}
	full, err := io.ReadAll(io.LimitReader(resp.Body, maxUpstreamBody))
	if err != nil {
		readErr = &upstreamError{err: err}
		_, _ = ticket.Fail(ctx, true)
		p.forwardFailed(w, ll, readErr)
		return
	}
	var a struct {
		Usage *wire.Usage `json:"usage"`
	}
	if json.Unmarshal(full, &a) != nil || a.Usage == nil {
		p.settle(ctx, ticket, team.Name, &flightResult{unstorable: true}, nil, budget.Bypass)
	} else {
		res.items = []served{{usage: *a.Usage}}
		p.settle(ctx, ticket, team.Name, res, nil, budget.Bypass)
		ll.usage = *a.Usage
	}
	ll.upstream = p.now().Sub(start)
	res.cost += x.failedCost
	h := w.Header()
	h.Set("Content-Type", "application/json")
	h.Set("Content-Length", strconv.Itoa(len(full)))
	p.setCacheStatus(h, ll, OutcomeBypass, http.StatusOK)
	p.spendHeaders(ctx, h, team.Name, res.cost, 0)
	ll.status = http.StatusOK
	w.WriteHeader(http.StatusOK)
	_, _ = w.Write(full)
}

// tokenFacts reads from a single-prompt answer its finish reason and how many
// completion tokens its token-level data list (-1 when it has none or they
// cannot be trusted to cut it, as with echo).
func tokenFacts(req *request, body []byte) (string, int) {
	var a struct {
		Choices []factChoice `json:"choices"`
	}
	if err := json.Unmarshal(body, &a); err != nil {
		return "", noLevel
	}
	return choiceFacts(req, a.Choices)
}

// answerFacts are tokenFacts' results, when the answer was decoded anyway.
type answerFacts struct {
	finish string
	tokens int
}

// factChoice is the part of an answer's choice tokenFacts reads.
type factChoice struct {
	FinishReason string `json:"finish_reason"`
	Logprobs     *struct {
		Tokens  []string          `json:"tokens"`
		Content []json.RawMessage `json:"content"`
	} `json:"logprobs"`
}

// choiceFacts is tokenFacts on decoded choices.
func choiceFacts(req *request, choices []factChoice) (string, int) {
	if len(choices) != 1 {
		return "", noLevel
	}
	c := choices[0]
	if c.Logprobs == nil || req.echo {
		return c.FinishReason, noLevel
	}
	if req.endpoint == endpointChat {
		return c.FinishReason, len(c.Logprobs.Content)
	}
	return c.FinishReason, len(c.Logprobs.Tokens)
}

// keyBody is the canonical JSON of the fields of req that shape its answer,
// with prompt set to one item. Transport fields (stream, stream_options,
// user) are left out, and so are the fields a stored answer can be cut down
// to (max_tokens and log-probability depth): those are kept per variant.
func keyBody(req *request, prompt json.RawMessage) ([]byte, error) {
	fields := make(map[string]json.RawMessage, len(req.fields))
	for k, v := range req.fields {
		switch k {
		case "stream", "stream_options", "user", "max_tokens", "max_completion_tokens", "logprobs", "top_logprobs":
			continue
		}
		fields[k] = v
	}
	if prompt != nil {
		fields["prompt"] = prompt
	}
	c := canonicalizers.Get().(*canon.Canonicalizer)
	defer canonicalizers.Put(c)
	return c.AppendValue(nil, fields)
}

// canonicalizers reuses canonicalizers' scratch buffers across requests.
// They keep the digits of integers a double cannot hold
// (canon.Canonicalizer.ExactIntegers): under RFC 8785 alone seed
// 9007199254740993 would share 9007199254740992's key.
var canonicalizers = sync.Pool{New: func() any { return &canon.Canonicalizer{ExactIntegers: true} }}

// checkCanonical reports whether body is I-JSON as RFC 8785 §3.1 requires (no
// duplicate member names, no lone surrogates, numbers a double can hold), so
// the key and the upstream read the same request.
func checkCanonical(body []byte) error {
	c := canonicalizers.Get().(*canon.Canonicalizer)
	defer canonicalizers.Put(c)
	buf := scratch.Get().(*[]byte)
	defer scratch.Put(buf)
	out, err := c.Append((*buf)[:0], body)
	*buf = out[:0]
	return err
}

var scratch = sync.Pool{New: func() any { b := make([]byte, 0, 4096); return &b }}
