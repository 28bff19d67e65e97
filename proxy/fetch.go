package proxy

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"time"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/wire"
)

// missCall is the upstream call for the missing prompts of a request.
type missCall struct {
	team   *Team
	keyID  string
	up     *Upstream // the routed upstream
	req    *request
	items  []item
	misses []int
	// holdDone keeps a relayed stream's final "data: [DONE]" event back
	// (flightResult.doneHeld) until the caller has stored the answer.
	holdDone bool
	// status is the Cache-Status of a relayed stream.
	status string
}

// flightResult is what one upstream call yields, shared by coalesced waiters.
type flightResult struct {
	full     []byte   // the upstream's whole answer, assembled when streamed
	items    []served // one per prompt sent
	streamed bool     // the leader already streamed the answer to its client
	doneHeld bool     // ... all of it but its final event (missCall.holdDone)
	// unstorable: the streamed answer was relayed but cannot be rebuilt for
	// storing or for sharing with waiters.
	unstorable bool
	// fromStore: answered from the shared store after another replica's
	// call (see SharedFlights), not by a call of this process.
	fromStore bool
	latency   time.Duration
	cost      budget.Nanos // what the call was charged (spend control on)
}

// fetch makes the upstream call for the missing prompts of c.req (through
// send: breaker, fallback, concurrency cap, retries, a reservation per
// attempt) and settles its cost. When streamTo is set (every prompt missed
// and the client asked for a stream) the answer is relayed to it as it
// arrives and assembled for storing. clientCtx is the requesting client's
// context; ctx bounds the call and outlives the client.
func (p *Proxy) fetch(clientCtx, ctx context.Context, c missCall, streamTo http.ResponseWriter) (*flightResult, error) {
	req, items, misses := c.req, c.items, c.misses
	stream := streamTo != nil
	var prompts []json.RawMessage
	if len(misses) != len(items) {
		prompts = make([]json.RawMessage, len(misses))
		for j, i := range misses {
			prompts[j] = items[i].prompt
		}
	}
	body, err := upstreamBody(req, prompts, stream)
	if err != nil {
		return nil, err
	}
	var admit admitFunc
	if p.spend != nil {
		admit = func(ctx context.Context, u *Upstream) (*guard.Ticket, error) {
			return p.spend.Admit(ctx, spendCall(ctx, c.team, c.keyID, u, req, items, misses))
		}
	}
	start := p.now()
	x, err := p.send(clientCtx, ctx, c.up, req.model, req.endpoint, body, admit)
	if err != nil {
		return nil, err
	}
	resp := x.resp
	defer resp.Body.Close()
	res := &flightResult{}
	if stream {
		res.streamed = true
		res.full, _, _, err = p.relay(streamTo, resp, req, c.status, c.holdDone)
		res.doneHeld = c.holdDone
	} else {
		res.full, err = io.ReadAll(io.LimitReader(resp.Body, maxUpstreamBody))
		if err != nil {
			err = &upstreamError{err: err}
		}
	}
	x.finish(err)
	res.latency = p.now().Sub(start)
	p.metrics.upstreamSeconds.WithLabelValues(x.up.Name, string(req.endpoint)).Observe(res.latency.Seconds())
	if errors.Is(err, errUnstorable) {
		res.unstorable = true
		err = nil
	} else if err == nil {
		res.items, err = splitAnswer(req, res.full, len(misses), itemPrompts(items, misses))
	}
	if x.ticket != nil {
		p.settle(ctx, x.ticket, c.team.Name, res, err, budget.Miss)
	}
	res.cost += x.failedCost
	if err != nil {
		return res, err
	}
	return res, nil
}

// writeDone sends a relayed stream's final event that relay held back.
func writeDone(w http.ResponseWriter) {
	_ = sse.NewWriter(w).WriteDone() // a client that has gone cannot take it
}

func itemPrompts(items []item, misses []int) []json.RawMessage {
	out := make([]json.RawMessage, len(misses))
	for j, i := range misses {
		out[j] = items[i].prompt
	}
	return out
}

func (p *Proxy) countUpstream(up *Upstream, ep endpoint, err error) {
	status := "200"
	var ue *upstreamError
	if errors.As(err, &ue) {
		if ue.status != 0 {
			status = strconv.Itoa(ue.status)
		} else {
			status = "transport_error"
		}
	}
	p.metrics.upstreamCalls.WithLabelValues(up.Name, string(ep), status).Inc()
}

// upstreamBody builds the body sent upstream: the client's own bytes when
// nothing needs changing, else its fields with the prompt replaced by the
// missing prompts and streaming set as the proxy needs it (a relayed stream
// always asks for the usage chunk, so the stored answer has real usage).
func upstreamBody(req *request, prompts []json.RawMessage, stream bool) ([]byte, error) {
	if prompts == nil && stream == req.stream && (!stream || req.includeUsage) {
		return req.raw, nil
	}
	fields := make(map[string]json.RawMessage, len(req.fields)+1)
	for k, v := range req.fields {
		fields[k] = v
	}
	if prompts != nil {
		b, err := json.Marshal(prompts)
		if err != nil {
			return nil, err
		}
		fields["prompt"] = b
	}
	if stream {
		fields["stream"] = json.RawMessage("true")
		so := map[string]json.RawMessage{}
		if raw, ok := req.fields["stream_options"]; ok && !isNull(raw) {
			if err := json.Unmarshal(raw, &so); err != nil {
				return nil, err
			}
		}
		so["include_usage"] = json.RawMessage("true")
		b, _ := json.Marshal(so)
		fields["stream_options"] = b
	} else {
		delete(fields, "stream")
		delete(fields, "stream_options")
	}
	return json.Marshal(fields)
}

// relay copies an upstream event stream to the client while assembling the
// whole answer. A client that goes away does not stop the relay: the call is
// paid for, so it is read to the end and stored.
//
// It returns the assembled answer (or errUnstorable) and the usage the
// stream reported, if it did. Spend figures, known only at the end, are sent
// as HTTP trailers. With holdDone the final "data: [DONE]" event is left for
// the caller to send (writeDone).
func (p *Proxy) relay(w http.ResponseWriter, resp *http.Response, req *request, cacheStatus string, holdDone bool) ([]byte, wire.Usage, bool, error) {
	h := w.Header()
	h.Set("Content-Type", "text/event-stream")
	h.Set("Cache-Control", "no-cache")
	h.Set(HeaderCacheStatus, cacheStatus)
	if p.spend != nil {
		h.Set("Trailer", HeaderCost+", "+HeaderSaved+", "+HeaderBudgetLeft)
	}
	w.WriteHeader(http.StatusOK)
	sw := sse.NewWriter(w)
	clientOK := true
	asm := newAssembler(req.endpoint)
	rd := sse.NewReader(resp.Body)
	for {
		ev, err := rd.Next()
		if err != nil {
			if errors.Is(err, io.EOF) {
				err = io.ErrUnexpectedEOF
			}
			return nil, wire.Usage{}, false, &upstreamError{err: fmt.Errorf("upstream stream ended early: %w", err)}
		}
		if ev.IsDone() {
			if clientOK && !holdDone {
				_ = sw.WriteDone()
			}
			break
		}
		usageOnly, err := asm.add([]byte(ev.Data))
		if err != nil {
			return nil, wire.Usage{}, false, &upstreamError{err: err}
		}
		if clientOK && (!usageOnly || req.includeUsage) {
			if err := sw.WriteData([]byte(ev.Data)); err != nil {
				clientOK = false
			}
		}
	}
	u, hasUsage := asm.reportedUsage()
	full, err := asm.result()
	return full, u, hasUsage, err
}

// splitAnswer cuts an upstream answer for nPrompts prompts into one
// single-prompt answer per prompt. A completions answer for several prompts
// carries choices with index prompt*n + j and one usage for all; each
// prompt's share of usage is apportioned (exact when the answer has token
// data, by length otherwise) and flagged as estimated.
func splitAnswer(req *request, full []byte, nPrompts int, prompts []json.RawMessage) ([]served, error) {
	if nPrompts == 1 {
		return splitOne(req, full)
	}
	var env map[string]json.RawMessage
	if err := json.Unmarshal(full, &env); err != nil {
		return nil, fmt.Errorf("upstream answer is not a JSON object: %w", err)
	}
	var u wire.Usage
	if raw, ok := env["usage"]; ok && !isNull(raw) {
		if err := json.Unmarshal(raw, &u); err != nil {
			return nil, fmt.Errorf("upstream usage: %w", err)
		}
	}
	var choices []map[string]json.RawMessage
	if err := json.Unmarshal(env["choices"], &choices); err != nil {
		return nil, fmt.Errorf("upstream answer has no choices array: %w", err)
	}
	if len(choices) != nPrompts*req.n {
		return nil, fmt.Errorf("upstream answered %d choices for %d prompts × n=%d", len(choices), nPrompts, req.n)
	}
	groups := make([][]map[string]json.RawMessage, nPrompts)
	for _, ch := range choices {
		var idx int
		if err := json.Unmarshal(ch["index"], &idx); err != nil || idx < 0 || idx >= nPrompts*req.n {
			return nil, fmt.Errorf("upstream choice has a bad index %s", ch["index"])
		}
		ch["index"] = json.RawMessage(strconv.Itoa(idx % req.n))
		groups[idx/req.n] = append(groups[idx/req.n], ch)
	}
	shares := apportion(u, groups, prompts)
	out := make([]served, nPrompts)
	for j, g := range groups {
		if len(g) != req.n {
			return nil, fmt.Errorf("upstream answered %d choices for prompt %d, want %d", len(g), j, req.n)
		}
		e := make(map[string]json.RawMessage, len(env))
		for k, v := range env {
			e[k] = v
		}
		cb, err := json.Marshal(g)
		if err != nil {
			return nil, err
		}
		e["choices"] = cb
		ub, _ := json.Marshal(shares[j])
		e["usage"] = ub
		b, err := json.Marshal(e)
		if err != nil {
			return nil, err
		}
		out[j] = served{body: b, usage: shares[j]}
	}
	return out, nil
}

// splitOne is splitAnswer for one prompt: the answer is served as it is,
// and the one decoding pass also yields the facts the stored variant needs
// (see tokenFacts). An answer whose choices do not fit that shape is still
// served; only its facts are then unknown.
func splitOne(req *request, full []byte) ([]served, error) {
	var (
		choices int
		u       *wire.Usage
		facts   = &answerFacts{tokens: noLevel}
	)
	var typed struct {
		Choices []factChoice `json:"choices"`
		Usage   *wire.Usage  `json:"usage"`
	}
	if err := json.Unmarshal(full, &typed); err == nil {
		choices, u = len(typed.Choices), typed.Usage
		facts.finish, facts.tokens = choiceFacts(req, typed.Choices)
	} else {
		var loose struct {
			Choices []json.RawMessage `json:"choices"`
			Usage   *wire.Usage       `json:"usage"`
		}
		if err := json.Unmarshal(full, &loose); err != nil {
			return nil, fmt.Errorf("upstream answer is not a completions object: %w", err)
		}
		choices, u = len(loose.Choices), loose.Usage
	}
	if choices != req.n {
		return nil, fmt.Errorf("upstream answered %d choices for 1 prompt × n=%d", choices, req.n)
	}
	var total wire.Usage
	if u != nil {
		total = *u
	}
	return []served{{body: full, usage: total, facts: facts}}, nil
}

// apportion splits a batched call's usage among its prompts so the shares add
// up exactly: completion tokens by each prompt's token count when logprobs
// list the tokens, else by text length; prompt tokens by prompt length.
func apportion(total wire.Usage, groups [][]map[string]json.RawMessage, prompts []json.RawMessage) []wire.Usage {
	pw := make([]int, len(groups))
	cw := make([]int, len(groups))
	for j, g := range groups {
		pw[j] = len(prompts[j])
		for _, ch := range g {
			var c struct {
				Text     string `json:"text"`
				Logprobs *struct {
					Tokens []string `json:"tokens"`
				} `json:"logprobs"`
			}
			_ = json.Unmarshal(mustMarshal(ch), &c)
			if c.Logprobs != nil && len(c.Logprobs.Tokens) > 0 {
				cw[j] += len(c.Logprobs.Tokens)
			} else {
				cw[j] += len(c.Text)
			}
		}
	}
	ps := splitInt(total.PromptTokens, pw)
	cs := splitInt(total.CompletionTokens, cw)
	out := make([]wire.Usage, len(groups))
	for j := range out {
		out[j] = wire.Usage{PromptTokens: ps[j], CompletionTokens: cs[j], TotalTokens: ps[j] + cs[j]}
	}
	return out
}

func mustMarshal(v any) []byte {
	b, _ := json.Marshal(v)
	return b
}

// splitInt divides total in proportion to weights by the largest-remainder
// method, so the parts sum to total exactly.
func splitInt(total int, weights []int) []int {
	out := make([]int, len(weights))
	sum := 0
	for _, w := range weights {
		sum += w
	}
	if sum == 0 {
		for i := range weights {
			weights[i] = 1
		}
		sum = len(weights)
	}
	type rem struct{ i, r int }
	rems := make([]rem, len(weights))
	given := 0
	for i, w := range weights {
		out[i] = total * w / sum
		given += out[i]
		rems[i] = rem{i, total * w % sum}
	}
	for left := total - given; left > 0; left-- {
		best := 0
		for k := range rems {
			if rems[k].r > rems[best].r {
				best = k
			}
		}
		out[rems[best].i]++
		rems[best].r = -1
	}
	return out
}
