package proxy

import (
	"context"
	"errors"
	"net/http"
	"time"

	"github.com/stintlab/stint/cache/runs"
)

// serveGenerate is the pipeline of POST /v1/completions and POST
// /v1/chat/completions. Its stages run in this order, each a method of the
// request's flow; a stage that returns false has answered the request
// itself (a refusal, or an answer found early) and the pipeline stops there:
//
//	authenticate     team key, in-flight cap
//	readBody         body-size limit
//	replayOrRecord   a replayed run is answered from its journal; a recorded
//	                 one has its answer journaled
//	answerRemembered exact bytes seen before: straight to the cache
//	decode           parse and validate, route to an upstream
//	bypass           not cacheable: forwarded as it came
//	lookUp           a cache key per prompt, hot tier then store
//	answerHits       every prompt was cached
//	coalesce         identical calls in flight share one; its leader runs
//	  lead             claim across replicas, then
//	  fetch            admit (budget, limits) and send (breaker, retries)
//	  store            the answers under their keys
//	answerFetched    merge hits and fetched answers and reply
//
// A request's state is its flow; the log line and metrics are written when
// it ends.
func (p *Proxy) serveGenerate(w http.ResponseWriter, r *http.Request, ep endpoint) {
	x := &flow{p: p, w: w, r: r, ep: ep, ll: logLine{endpoint: ep}, start: p.now()}
	defer x.end()
	if !x.authenticate() || !x.readBody() || !x.replayOrRecord() || !x.answerRemembered() ||
		!x.decode() || !x.bypass() || !x.lookUp() || !x.answerHits() || !x.coalesce() {
		return
	}
	x.answerFetched()
}

// flow is one generation request on its way through serveGenerate's
// stages: what each stage found, for the stages after it. It belongs to
// the request's goroutine.
type flow struct {
	p     *Proxy
	w     http.ResponseWriter // the recorder's, once recording (replayOrRecord)
	r     *http.Request
	ep    endpoint
	ll    logLine
	start time.Time
	// release gives back the in-flight slot (authenticate); journal
	// journals a recorded call's answer (replayOrRecord). Both run when the
	// request is done, journal first.
	release, journal func()

	team  *Team  // authenticate
	keyID string // authenticate: the client key's id
	body  []byte // readBody

	d      directives // answerRemembered: the request's Cache-Control
	memoID [32]byte   // answerRemembered: the key of these exact bytes

	req    *request  // decode
	up     *Upstream // decode: the routed upstream
	greedy bool      // decode

	items  []item // lookUp: one per prompt (one for chat)
	misses []int  // lookUp: indexes of items not cached

	// coalesce and lead: the call's result, whether it was another
	// request's (shared), whether this request's leader relayed it as a
	// stream, and whether the leader holds a lease across replicas.
	res            *flightResult
	shared         bool
	leaderStreamed bool
	holding        bool
}

// end journals a recorded call, gives back the in-flight slot, then logs
// and counts the request.
func (x *flow) end() {
	if x.journal != nil {
		x.journal()
	}
	if x.release != nil {
		x.release()
	}
	x.p.finish(&x.ll, x.start)
}

// fail answers e as the request's outcome.
func (x *flow) fail(e *apiError) {
	x.ll.status = e.status
	if x.ll.outcome == "" {
		x.ll.outcome = "error"
	}
	writeError(x.w, e)
}

// authenticate finds the caller's team and takes a slot of its in-flight
// cap (see Proxy.enter).
func (x *flow) authenticate() bool {
	team, keyID, release, aerr := x.p.enter(x.w, x.r)
	if aerr != nil {
		x.ll.status, x.ll.outcome = aerr.status, "error"
		return false
	}
	x.release, x.team, x.keyID = release, team, keyID
	x.ll.team = team.Name
	return true
}

// readBody reads the request body within the size limit.
func (x *flow) readBody() bool {
	body, aerr := x.p.readBody(x.w, x.r)
	if aerr != nil {
		x.fail(aerr)
		return false
	}
	x.body = body
	return true
}

// replayOrRecord answers a call of a replayed run from the run's journal;
// a call of a recorded run goes on with its writer wrapped, so its answer
// is journaled before the client has it. A team whose runs are at their
// quota cannot record: refused before anything is paid for (a call that
// fits now but whose answer does not is refused when it is journaled).
func (x *flow) replayOrRecord() bool {
	rc, aerr := runHeaders(x.r.Header)
	if aerr != nil {
		x.fail(aerr)
		return false
	}
	if rc.id == "" {
		return true
	}
	p := x.p
	if p.runs == nil {
		x.fail(runsOff())
		return false
	}
	if rc.replay {
		if aerr := p.serveReplay(x.w, x.r, &x.ll, x.team, rc, x.ep, x.body); aerr != nil {
			x.fail(aerr)
		}
		return false
	}
	if u, err := p.runs.Usage(x.r.Context(), x.team.Name); err != nil {
		x.fail(journalError(err))
		return false
	} else if u.QuotaBytes > 0 && u.Bytes >= u.QuotaBytes {
		x.fail(quotaError(&runs.QuotaError{Team: x.team.Name, Used: u.Bytes, Quota: u.QuotaBytes}))
		return false
	}
	x.r = x.r.WithContext(withRun(x.r.Context(), rc.id)) // spend entries name the run
	rr := &runRecorder{w: x.w}
	x.w = rr // every answer below writes through the recorder
	r, team, ep, body := x.r, x.team, x.ep, x.body
	x.journal = func() {
		rr.finish(func(a runs.Answer) error { return p.recordCall(r.Context(), team, rc, ep, body, rr.Header(), a) })
	}
	return true
}

// answerRemembered answers from the cache without decoding when these exact
// bytes were decoded before (the request memo) and their answer is cached.
func (x *flow) answerRemembered() bool {
	p := x.p
	x.d = parseDirectives(x.r.Header)
	x.ll.noCache = x.d.noCache
	x.memoID = memoKey(x.team, x.ep, x.body)
	m, ok := p.memo.get(x.memoID)
	if !ok || x.d.noCache || p.logPrompts {
		return true
	}
	hit, _ := p.lookup(x.r.Context(), &x.ll, &m.req, m.key, p.greedy(&m.req))
	if hit == nil {
		return true
	}
	ll := &x.ll
	ll.model, ll.prompts, ll.hits, ll.outcome = m.req.model, 1, 1, OutcomeHit
	ll.key, ll.storedAt = m.key, hit.storedAt
	p.metrics.series(x.team.Name, string(x.ep), OutcomeHit).hitPrompts.Inc()
	fig := spendFigures{team: x.team.Name, saved: p.noteSaved(x.r.Context(), x.team, x.keyID, &m.req, hit.usage)}
	p.answer(x.w, ll, &m.req, []item{{key: m.key, hit: hit}}, nil, OutcomeHit, fig)
	return false
}

// decode parses and validates the body and routes it to an upstream that
// serves its model.
func (x *flow) decode() bool {
	p := x.p
	req, aerr := parseRequest(x.ep, x.body, p.maxPrompts)
	if aerr != nil {
		x.fail(aerr)
		return false
	}
	x.req = req
	x.ll.model = req.model
	if p.logPrompts {
		x.ll.promptText = promptText(req)
	}
	x.up = p.route(req.model)
	if x.up == nil {
		x.fail(p.notRouted(req.model))
		return false
	}
	if e := req.checkLogprobs(x.up.maxLogprobs(), x.up.Name); e != nil {
		x.fail(e)
		return false
	}
	x.greedy = p.greedy(req)
	return true
}

// bypass forwards a request that may not be cached upstream as it came
// (unless it said only-if-cached).
func (x *flow) bypass() bool {
	if x.p.cacheable(x.team, x.req) {
		return true
	}
	if x.d.onlyIfCached {
		x.fail(notCached())
		return false
	}
	x.ll.outcome = OutcomeBypass
	x.p.forward(x.w, x.r, &x.ll, x.team, x.keyID, x.up, x.req)
	return false
}

// lookUp derives each prompt's cache key and looks it up (unless the
// request said no-cache), noting the misses.
func (x *flow) lookUp() bool {
	p, req, ll := x.p, x.req, &x.ll
	x.items = make([]item, 1)
	if req.endpoint == endpointCompletions {
		x.items = make([]item, len(req.prompts))
		for i, pr := range req.prompts {
			x.items[i].prompt = pr
		}
	}
	for i := range x.items {
		it := &x.items[i]
		k, err := itemKey(x.team, x.up, req, it.prompt)
		if err != nil {
			x.fail(badRequest("", "request cannot be canonicalized: %v", err))
			return false
		}
		it.key = k
		if len(x.items) == 1 && !req.promptsArray {
			p.memo.remember(x.memoID, req, k)
		}
		if !x.d.noCache {
			it.hit, it.stored = p.lookup(x.r.Context(), ll, req, k, x.greedy)
			it.looked = true
		}
		if it.hit == nil {
			x.misses = append(x.misses, i)
		}
	}
	ll.prompts, ll.hits = len(x.items), len(x.items)-len(x.misses)
	if len(x.items) == 1 {
		ll.key = x.items[0].key
	}
	ll.storedAt = oldestStored(x.items)
	p.metrics.prompts.WithLabelValues(x.team.Name, "hit").Add(float64(ll.hits))
	p.metrics.prompts.WithLabelValues(x.team.Name, "miss").Add(float64(len(x.misses)))
	return true
}

// answerHits answers a request whose every prompt was cached, and refuses
// one with misses that said only-if-cached.
func (x *flow) answerHits() bool {
	if len(x.misses) == 0 {
		x.ll.outcome = OutcomeHit
		fig := spendFigures{team: x.team.Name, saved: x.p.noteSaved(x.r.Context(), x.team, x.keyID, x.req, itemsUsage(x.items, nil))}
		x.p.answer(x.w, &x.ll, x.req, x.items, nil, OutcomeHit, fig)
		return false
	}
	if x.d.onlyIfCached {
		x.fail(notCached())
		return false
	}
	return true
}

// coalesce makes the upstream call for the misses, or waits for an
// identical one already in flight in this process (then shared is set).
func (x *flow) coalesce() bool {
	res, shared, err := x.p.flights.Do(x.r.Context(), flightKeyFor(x.items, x.misses, x.req), x.lead)
	x.shared = shared
	if err != nil {
		x.flightFailed(err)
		return false
	}
	x.res = res
	return true
}

// lead is the work of the call that identical requests share: it outlives
// any one client's disconnect, bounded by the upstream's timeout. With
// SharedFlights it first claims the call across replicas, which may find
// the answer another replica stored.
func (x *flow) lead() (*flightResult, error) {
	ctx, cancel := context.WithTimeout(context.WithoutCancel(x.r.Context()), x.up.timeout())
	defer cancel()
	if res, release := x.claimAcrossReplicas(ctx); res != nil {
		return res, nil
	} else if release != nil {
		x.holding = true
		defer func() {
			if err := release(ctx); err != nil {
				x.p.log.Warn("cannot release a shared lease; it expires by itself", "err", err)
			}
		}()
	}
	res, streamTo, err := x.fetch(ctx)
	if err != nil {
		return nil, err
	}
	if !x.d.noStore && !res.unstorable {
		x.store(ctx, res)
	}
	if res.doneHeld {
		writeDone(streamTo)
	}
	return res, nil
}

// claimAcrossReplicas is Proxy.claimShared for a request with one missing
// prompt that may be stored, when misses are coalesced across replicas.
func (x *flow) claimAcrossReplicas(ctx context.Context) (*flightResult, func(context.Context) error) {
	if x.p.shared == nil || len(x.misses) != 1 || x.d.noCache || x.d.noStore {
		return nil, nil
	}
	return x.p.claimShared(ctx, &x.ll, x.req, &x.items[x.misses[0]], x.greedy)
}

// fetch calls the upstream for the misses (Proxy.fetch: admission to the
// budget and rate limits per attempt, then the breaker, fallbacks and
// retries). When every prompt missed and the client asked for a stream,
// the answer is relayed to it as it arrives (streamTo).
func (x *flow) fetch(ctx context.Context) (res *flightResult, streamTo http.ResponseWriter, err error) {
	p := x.p
	if x.req.stream && len(x.misses) == len(x.items) {
		streamTo = x.w
	}
	// A relayed stream's headers go out before it is known whether its
	// answer can be stored: they do not say stored.
	streamStatus := p.cacheStatusOf(&x.ll, OutcomeMiss, http.StatusOK).String()
	holdDone := !x.d.noStore && p.storeBeforeAnswer
	res, err = p.fetch(x.r.Context(), ctx, missCall{x.team, x.keyID, x.up, x.req, x.items, x.misses, holdDone, streamStatus}, streamTo)
	if res != nil && res.streamed {
		x.leaderStreamed = true
	}
	if x.leaderStreamed && err == nil {
		p.spendHeaders(ctx, x.w.Header(), x.team.Name, res.cost, 0)
	}
	return res, streamTo, err
}

// store records the fetched answers. A lease holder stores before it
// releases, so the replicas waiting on it find the answer; with
// StoreBeforeAnswer every answer waits for its entry.
func (x *flow) store(ctx context.Context, res *flightResult) {
	sync := x.holding || x.p.storeBeforeAnswer
	x.ll.stored = x.p.storeItems(ctx, &x.ll, x.req, x.items, x.misses, res.items, x.greedy, sync)
}

// flightFailed answers a failed upstream call in the terms of its failure.
func (x *flow) flightFailed(err error) {
	var ae *admitError
	if errors.As(err, &ae) {
		x.fail(spendError(ae.err))
		return
	}
	if x.leaderStreamed {
		// Headers and part of the stream are out; abort so the client sees a broken stream.
		x.ll.outcome, x.ll.status = OutcomeMiss, http.StatusBadGateway
		panic(http.ErrAbortHandler)
	}
	var ue *upstreamError
	if errors.As(err, &ue) {
		x.ll.outcome = OutcomeMiss
		if x.shared {
			x.ll.outcome = OutcomeShared
		}
		x.p.writeUpstreamError(x.w, &x.ll, ue)
		return
	}
	if errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
		x.fail(&apiError{status: http.StatusGatewayTimeout, typ: errUpstream, code: "client_gone", message: "the request ended before the answer arrived"})
		return
	}
	x.fail(&apiError{status: http.StatusBadGateway, typ: errUpstream, code: "bad_upstream_answer", message: err.Error()})
}

// answerFetched answers from the cached prompts and the call's answers (a
// stream this request's leader relayed is already answered), with the
// request's cost, or what it saved when another request's call answered it.
func (x *flow) answerFetched() {
	p, ll, res := x.p, &x.ll, x.res
	if res.fromStore {
		x.shared = true // another replica's call answered it
	}
	if x.shared {
		ll.stored = false // the call and its store were another request's
	}
	ll.upstream = res.latency
	if res.unstorable && !(x.leaderStreamed && !x.shared) {
		x.fail(&apiError{status: http.StatusBadGateway, typ: errUpstream, code: "not_shareable", message: "an identical streamed call was in flight but its answer could not be shared; retry"})
		return
	}
	outcome := OutcomeMiss
	switch {
	case ll.hits > 0:
		outcome = OutcomePartial
	case x.shared:
		outcome = OutcomeShared
	}
	ll.outcome = outcome
	if x.leaderStreamed && !x.shared {
		ll.status = http.StatusOK
		_, ll.usage = mergeUsage(res.items)
		return
	}
	for j, i := range x.misses {
		x.items[i].hit = &res.items[j]
	}
	var full []byte
	if ll.hits == 0 {
		full = res.full
	}
	fig := spendFigures{team: x.team.Name}
	ctx := x.r.Context()
	if x.shared {
		// Answered by another request's call: all of it was free to this one.
		fig.saved = p.noteSaved(ctx, x.team, x.keyID, x.req, itemsUsage(x.items, nil))
	} else {
		fig.cost = res.cost
		if ll.hits > 0 {
			fig.saved = p.noteSaved(ctx, x.team, x.keyID, x.req, itemsUsage(x.items, hitIndexes(x.items, x.misses)))
		}
	}
	p.answer(x.w, ll, x.req, x.items, full, outcome, fig)
}

// notCached is the refusal of a request that said only-if-cached and
// missed.
func notCached() *apiError {
	return &apiError{status: http.StatusGatewayTimeout, typ: errCache, code: "not_cached", message: "the answer is not in the cache and the request said only-if-cached"}
}
