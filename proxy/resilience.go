package proxy

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"net/http"
	"strconv"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/retry"
	"github.com/stintlab/stint/proxy/scrub"
)

// How a miss reaches an upstream (send):
//
//  1. The routed upstream, or while its breaker is open the first of its
//     Fallback upstreams that serves the model and whose breaker allows
//     the call. With every breaker open the request gets 503 with
//     Retry-After (the seconds until the routed upstream's breaker lets a
//     probe through); cache hits are served as usual.
//  2. Under spend control the attempt reserves its own worst case on the
//     ledger (Admit, which also waits on rate limits). A failed attempt
//     is settled by the rule of settle: an error status the upstream
//     answered with costs nothing; anything that may have reached the
//     provider (a timeout or a connection lost after the request was
//     written) is charged its whole reservation. A successful request's
//     Stint-Cost-Usd includes what its failed attempts were charged.
//  3. A slot of the upstream's MaxConcurrent cap, waiting while the
//     client is there and the request's upstream deadline allows. A
//     request that gets no slot in time gets 503 upstream_busy with
//     Retry-After: 1 (nothing was sent; its reservation is released).
//  4. The call, bounded by the upstream's Timeout.
//  5. On failure, a retry when it is safe and fits: only for a connection
//     error or timeout before any answer, or a 429, 502, 503 or 504
//     answer; after the upstream's Retry-After (delay-seconds or
//     HTTP-date, RFC 9110 §10.2.3) when it sent one, else after a full
//     jitter backoff (retry.Policy); never when the wait would pass the
//     deadline of the request's upstream exchange (the routed upstream's
//     Timeout) or the client whose request made the call has gone (others
//     coalesced onto the call then get its last failure), and never once
//     an answer has started to reach the client. A retry after a 429 is
//     also paid from the answering upstream's retry budget (retry.Budget,
//     fed by every first call to it), so a storm of 429s costs the
//     upstream about 1 + BudgetShare calls per request, not Attempts. When
//     no retry is left the client gets the last failure as it was.
//
// The breaker counts 5xx answers, timeouts, connection errors and answers
// cut short as failures; any other answer, 4xx included, as a success;
// 429 as neither (it is back-pressure, which retries and rate limits
// handle, not a sign the upstream is down).

// upstreamState is an upstream's run-time parts, made by New.
type upstreamState struct {
	scrub    *scrub.Scrubber // nil: no credentials to mask
	retries  *retry.Budget   // pays for retries after a 429; nil: none needed
	breaker  *breaker.Breaker
	slots    chan struct{} // nil: no concurrency cap
	fallback []*Upstream
}

// resilience holds the proxy-wide parts of send.
type resilience struct {
	sleep func(ctx context.Context, d time.Duration) error
	m     *resilienceMetrics

	mu  sync.Mutex // guards rnd
	rnd *rand.Rand
}

// next is the wait before retry n under pol (see retry.Policy.Next).
func (r *resilience) next(pol retry.Policy, n int, h http.Header, now time.Time) (retry.Delay, bool) {
	r.mu.Lock()
	defer r.mu.Unlock()
	return pol.Next(n, h, now, r.rnd)
}

// sleepTimer waits d or until ctx ends.
func sleepTimer(ctx context.Context, d time.Duration) error {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// initUpstreams builds each upstream's breaker, concurrency cap and
// fallback list.
func (p *Proxy) initUpstreams(opts Options) error {
	src := opts.Rand
	if src == nil {
		src = rand.NewPCG(rand.Uint64(), rand.Uint64())
	}
	m, err := newResilienceMetrics(opts.Registerer, p.upstreams)
	if err != nil {
		return err
	}
	p.resil = &resilience{sleep: opts.Sleep, m: m, rnd: rand.New(src)}
	if p.resil.sleep == nil {
		p.resil.sleep = sleepTimer
	}
	byName := make(map[string]*Upstream, len(p.upstreams))
	for i := range p.upstreams {
		u := &p.upstreams[i]
		if byName[u.Name] != nil {
			return fmt.Errorf("proxy: two upstreams are named %q", u.Name)
		}
		byName[u.Name] = u
	}
	for i := range p.upstreams {
		u := &p.upstreams[i]
		if u.MaxConcurrent < 0 {
			return fmt.Errorf("proxy: upstream %s: MaxConcurrent must not be negative", u.Name)
		}
		if err := u.Retry.Validate(); err != nil {
			return fmt.Errorf("proxy: upstream %s: %w", u.Name, err)
		}
		name := u.Name
		b, err := breaker.New(name, u.Breaker, opts.BreakerStore, breaker.Hooks{
			OnTrip: func() { m.trips.WithLabelValues(name).Inc() },
			OnStoreError: func(err error) {
				m.storeErrors.WithLabelValues(name).Inc()
				p.log.Warn("shared breaker state unreachable; using this replica's own", "upstream", name, "err", err)
			},
		})
		if err != nil {
			return fmt.Errorf("proxy: upstream %s: %w", u.Name, err)
		}
		rt := &upstreamState{breaker: b, scrub: p.scrub, retries: u.Retry.Budget()}
		if u.MaxConcurrent > 0 {
			rt.slots = make(chan struct{}, u.MaxConcurrent)
		}
		for _, fb := range u.Fallback {
			f := byName[fb]
			switch {
			case f == nil:
				return fmt.Errorf("proxy: upstream %s: fallback %q is not an upstream", u.Name, fb)
			case f == u:
				return fmt.Errorf("proxy: upstream %s: an upstream cannot be its own fallback", u.Name)
			}
			rt.fallback = append(rt.fallback, f)
		}
		u.rt = rt
	}
	return nil
}

// chain is the upstreams a call for model may go to, in order.
func (u *Upstream) chain(model string) []*Upstream {
	out := []*Upstream{u}
	for _, f := range u.rt.fallback {
		if f.matches(model) {
			out = append(out, f)
		}
	}
	return out
}

// acquire takes a concurrency slot, waiting while both contexts last.
// waiting counts the calls that wait.
func (rt *upstreamState) acquire(clientCtx, ctx context.Context, waiting prometheus.Gauge) (func(), error) {
	if rt.slots == nil {
		return func() {}, nil
	}
	select {
	case rt.slots <- struct{}{}:
		return func() { <-rt.slots }, nil
	default:
	}
	waiting.Inc()
	defer waiting.Dec()
	select {
	case rt.slots <- struct{}{}:
		return func() { <-rt.slots }, nil
	case <-ctx.Done():
		return nil, ctx.Err()
	case <-clientCtx.Done():
		return nil, clientCtx.Err()
	}
}

// busyError is a call that got no concurrency slot in time.
type busyError struct {
	upstream string
	err      error
}

func (e *busyError) Error() string {
	return fmt.Sprintf("upstream %s is at its concurrency cap: %v", e.upstream, e.err)
}

func (e *busyError) Unwrap() error { return e.err }

// exchange is an upstream response with a 2xx status, still to be read.
type exchange struct {
	resp   *http.Response
	up     *Upstream     // the upstream that answered
	ticket *guard.Ticket // its attempt's reservation; nil without spend control
	// failedCost is what the request's failed attempts were charged.
	failedCost budget.Nanos
	permit     *breaker.Permit
	release    func() // frees the slot and ends the attempt's context
}

// finish reports how reading the answer went to the breaker and frees the
// slot. Call it exactly once, after the body has been read.
func (x *exchange) finish(readErr error) {
	x.permit.Done(outcomeOf(readErr))
	x.release()
}

// admitFunc reserves an attempt's cost for upstream u; nil without spend
// control.
type admitFunc func(ctx context.Context, u *Upstream) (*guard.Ticket, error)

// send makes the upstream call of a request routed to up (see the comment
// at the top of this file). clientCtx is the client's own context (for
// giving up); ctx bounds the upstream exchange and outlives the client.
func (p *Proxy) send(clientCtx, ctx context.Context, up *Upstream, model string, ep endpoint, body []byte, admit admitFunc) (*exchange, error) {
	chain := up.chain(model)
	attempts := up.Retry.MaxAttempts()
	var (
		last   error
		failed budget.Nanos
	)
	for n := 0; ; {
		u, permit, err := pick(chain)
		if err != nil {
			if last != nil {
				return nil, last
			}
			return nil, &upstreamError{err: err}
		}
		if u != up {
			p.resil.m.fallbacks.WithLabelValues(up.Name, u.Name).Inc()
		}
		if n == 0 {
			u.rt.retries.Called()
		}
		var ticket *guard.Ticket
		if admit != nil {
			t, err := admit(ctx, u)
			if err != nil {
				permit.Done(breaker.Ignored)
				return nil, &admitError{err}
			}
			ticket = t
		}
		release, err := u.rt.acquire(clientCtx, ctx, p.resil.m.slotWaiting.WithLabelValues(u.Name))
		if err != nil {
			permit.Done(breaker.Ignored)
			if ticket != nil {
				_ = ticket.Cancel(context.WithoutCancel(ctx))
			}
			return nil, &upstreamError{err: &busyError{upstream: u.Name, err: err}}
		}
		actx, cancel := context.WithTimeout(ctx, u.timeout())
		resp, err := u.post(actx, ep, body)
		p.countUpstream(u, ep, err)
		if err == nil {
			return &exchange{resp: resp, up: u, ticket: ticket, failedCost: failed, permit: permit,
				release: func() { cancel(); release() }}, nil
		}
		cancel()
		release()
		permit.Done(outcomeOf(err))
		if ticket != nil {
			if ch, ferr := ticket.Fail(context.WithoutCancel(ctx), billed(err)); ferr == nil || errors.Is(ferr, guard.ErrJournal) {
				failed += ch.Cost
			}
		}
		last = err
		n++
		if n >= attempts || !retryable(err) || ctx.Err() != nil || clientCtx.Err() != nil {
			return nil, err
		}
		var ue *upstreamError
		var h http.Header
		if errors.As(err, &ue) {
			h = ue.header
			if ue.status == http.StatusTooManyRequests && !u.rt.retries.Retry() {
				p.resil.m.denied.WithLabelValues(u.Name).Inc()
				return nil, err
			}
		}
		d, ok := p.resil.next(up.Retry, n-1, h, p.now())
		if !ok {
			return nil, err
		}
		if !fitsDeadline(d.Wait, clientCtx, ctx) {
			return nil, err
		}
		p.resil.m.retries.WithLabelValues(u.Name, retryReason(err)).Inc()
		if werr := p.wait(clientCtx, ctx, d.Wait); werr != nil {
			return nil, err
		}
	}
}

// pick returns the first upstream of chain whose breaker allows a call, or
// the routed upstream's refusal.
func pick(chain []*Upstream) (*Upstream, *breaker.Permit, error) {
	var first error
	for _, u := range chain {
		permit, err := u.rt.breaker.Allow()
		if err == nil {
			return u, permit, nil
		}
		if first == nil {
			first = err
		}
	}
	return nil, nil, first
}

// wait sleeps d, returning early with an error when either context ends.
func (p *Proxy) wait(clientCtx, ctx context.Context, d time.Duration) error {
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	stop := context.AfterFunc(clientCtx, cancel)
	defer stop()
	return p.resil.sleep(wctx, d)
}

// fitsDeadline reports whether waiting d leaves both contexts alive: a
// retry is never scheduled past a deadline.
func fitsDeadline(d time.Duration, ctxs ...context.Context) bool {
	now := time.Now()
	for _, c := range ctxs {
		if dl, ok := c.Deadline(); ok && !now.Add(d).Before(dl) {
			return false
		}
	}
	return true
}

// retryable reports whether a failed attempt may be made again: an answer
// with 429, 502, 503 or 504, or a transport failure before any answer
// (not a cancellation).
func retryable(err error) bool {
	var ue *upstreamError
	if !errors.As(err, &ue) {
		return false
	}
	switch ue.status {
	case http.StatusTooManyRequests, http.StatusBadGateway, http.StatusServiceUnavailable, http.StatusGatewayTimeout:
		return true
	case 0:
		return !errors.Is(err, context.Canceled)
	}
	return false
}

// retryReason is the reason label of the retries metric.
func retryReason(err error) string {
	var ue *upstreamError
	if errors.As(err, &ue) && ue.status != 0 {
		return strconv.Itoa(ue.status)
	}
	if ue != nil && ue.apiError().status == http.StatusGatewayTimeout {
		return "timeout"
	}
	return "transport"
}

// outcomeOf classifies a call's end for the breaker.
func outcomeOf(err error) breaker.Outcome {
	if err == nil || errors.Is(err, errUnstorable) {
		return breaker.Success
	}
	var ue *upstreamError
	if !errors.As(err, &ue) {
		return breaker.Success // the upstream answered; the answer did not fit the request
	}
	switch {
	case ue.status == http.StatusTooManyRequests:
		return breaker.Ignored
	case ue.status >= 500:
		return breaker.Failure
	case ue.status != 0:
		return breaker.Success
	case errors.Is(err, context.Canceled):
		return breaker.Ignored
	}
	return breaker.Failure
}
