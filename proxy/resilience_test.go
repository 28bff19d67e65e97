package proxy_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"slices"
	"strconv"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/goleak"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
	"github.com/stintlab/stint/proxy/retry"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// noLeaks fails the test if goroutines it started outlive it. Call it
// first: its check runs after every other cleanup (servers, proxies).
func noLeaks(t *testing.T) {
	t.Helper()
	opt := goleak.IgnoreCurrent()
	t.Cleanup(func() { goleak.VerifyNone(t, opt) })
}

// sleeps records the retry waits the proxy asks for and returns at once
// (or with ctx's error), so tests check the waits computed, not the clock.
type sleeps struct {
	mu  sync.Mutex // guards got
	got []time.Duration
}

func (s *sleeps) sleep(ctx context.Context, d time.Duration) error {
	s.mu.Lock()
	s.got = append(s.got, d)
	s.mu.Unlock()
	return ctx.Err()
}

func (s *sleeps) waits() []time.Duration {
	s.mu.Lock()
	defer s.mu.Unlock()
	return slices.Clone(s.got)
}

// withResilience sets the only upstream's breaker and retries, and records
// retry waits in sl (nil: real waits).
func withResilience(b breaker.Settings, rp retry.Policy, sl *sleeps) rigOption {
	return func(o *proxy.Options) {
		o.Upstreams[0].Breaker = b
		o.Upstreams[0].Retry = rp
		o.Rand = rand.NewPCG(7, 11)
		if sl != nil {
			o.Sleep = sl.sleep
		}
	}
}

var noRetries = retry.Policy{Attempts: -1}

func (r *rig) breakerState() float64 {
	r.t.Helper()
	return r.metric("stint_upstream_breaker_state", "upstream", "fake")
}

// assertOpenAnswer checks a 503 from an open breaker: the wire error shape
// and a Retry-After of whole seconds no longer than openFor.
func assertOpenAnswer(t *testing.T, got response, openFor time.Duration) {
	t.Helper()
	require.Equal(t, http.StatusServiceUnavailable, got.status, "status %d %s, want 503 upstream_circuit_open", got.status, got.body)
	require.Equal(t, "upstream_circuit_open", errorCode(t, got.body), "status %d %s, want 503 upstream_circuit_open", got.status, got.body)
	ra, err := strconv.Atoi(got.header.Get("Retry-After"))
	require.NoError(t, err, "Retry-After %q, want whole seconds", got.header.Get("Retry-After"))
	require.GreaterOrEqual(t, ra, 1, "Retry-After %q, want 1 to %v in whole seconds", got.header.Get("Retry-After"), openFor)
	require.LessOrEqual(t, time.Duration(ra)*time.Second, openFor, "Retry-After %q, want 1 to %v in whole seconds", got.header.Get("Retry-After"), openFor)
}

func TestBreakerOpensWithinTheConfiguredCount(t *testing.T) {
	tests := []struct {
		name    string
		fault   upstreamtest.Fault
		timeout time.Duration
		status  int // what the failing calls answer
	}{
		{"500", upstreamtest.Fault{Status: 500}, 0, 500},
		{"503", upstreamtest.Fault{Status: 503}, 0, 503},
		{"connection reset", upstreamtest.Fault{Reset: true}, 0, 502},
		{"hang past the timeout", upstreamtest.Fault{Hang: true}, 100 * time.Millisecond, 504},
		{"answer cut short", upstreamtest.Fault{Cut: 10}, 0, 502},
	}
	const trip = 3
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			r := newRig(t, withResilience(breaker.Settings{ConsecutiveFailures: trip, FailureRatio: -1}, noRetries, nil), func(o *proxy.Options) {
				if tt.timeout > 0 {
					o.Upstreams[0].Timeout = tt.timeout
				}
			})
			r.up.FailRatio(1, tt.fault)
			for i := range trip {
				got := r.complete(greedy(fmt.Sprintf("failing call %d", i)))
				require.Equal(t, tt.status, got.status, "call %d: status %d, want %d: %s", i, got.status, tt.status, got.body)
			}
			got := r.complete(greedy("after the trip"))
			assertOpenAnswer(t, got, breaker.DefaultOpenFor)
			n := r.upstreamGenerations()
			assert.Equal(t, trip, n, "upstream saw %d calls, want %d (none once open)", n, trip)
			s := r.breakerState()
			assert.Equal(t, float64(2), s, "stint_upstream_breaker_state = %v, want 2 (open)", s)
			assert.Equal(t, float64(1), r.metric("stint_upstream_breaker_trips_total", "upstream", "fake"), "trips")
		})
	}
}

func TestFailureRatioTrips(t *testing.T) {
	noLeaks(t)
	r := newRig(t, withResilience(breaker.Settings{ConsecutiveFailures: -1, FailureRatio: 0.5, MinRequests: 10}, noRetries, nil))
	// Every second call fails: the 10th call makes 5 of 10.
	r.up.FailRatio(0.5, upstreamtest.Fault{Status: 502})
	for i := range 10 {
		r.complete(greedy(fmt.Sprintf("ratio call %d", i)))
	}
	assertOpenAnswer(t, r.complete(greedy("one more")), breaker.DefaultOpenFor)
	n := r.upstreamGenerations()
	assert.Equal(t, 10, n, "upstream saw %d calls, want 10", n)
}

func TestClientErrorsDoNotTrip(t *testing.T) {
	for _, status := range []int{400, 401, 404, 422, 429} {
		t.Run(strconv.Itoa(status), func(t *testing.T) {
			noLeaks(t)
			r := newRig(t, withResilience(breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1}, noRetries, nil))
			r.up.FailRatio(1, upstreamtest.Fault{Status: status})
			for i := range 6 {
				got := r.complete(greedy(fmt.Sprintf("call %d", i)))
				require.Equal(t, status, got.status, "call %d: status %d, want the upstream's %d passed through", i, got.status, status)
			}
			n := r.upstreamGenerations()
			assert.Equal(t, 6, n, "upstream saw %d calls, want 6", n)
			s := r.breakerState()
			assert.Equal(t, float64(0), s, "breaker state %v, want 0 (closed)", s)
		})
	}
}

func TestHitsAreServedWhileOpenAndAProbeClosesIt(t *testing.T) {
	noLeaks(t)
	// Long enough that the checks while open finish before it ends, even on
	// a loaded machine; the half-open wait polls.
	const openFor = 1500 * time.Millisecond
	r := newRig(t, withResilience(breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1, OpenFor: openFor}, noRetries, nil))
	cached := greedy("the lock keeper's ledger")
	warm := r.complete(cached)
	require.Equal(t, http.StatusOK, warm.status, "warming the cache: %s", warm.body)
	require.Equal(t, proxy.OutcomeMiss, warm.cache(), "warming the cache")
	r.up.FailRatio(1, upstreamtest.Fault{Status: 500})
	r.complete(greedy("fail one"))
	r.complete(greedy("fail two"))
	s := r.breakerState()
	require.Equal(t, float64(2), s, "breaker state %v, want open", s)
	calls := r.upstreamGenerations()
	whileOpen := r.complete(cached)
	assert.Equal(t, http.StatusOK, whileOpen.status, "cached answer while open")
	assert.Equal(t, proxy.OutcomeHit, whileOpen.cache(), "cached answer while open")
	assertOpenAnswer(t, r.complete(greedy("a miss while open")), 2*time.Second)
	assert.Equal(t, calls, r.upstreamGenerations(), "the upstream was called while open")
	// After openFor the breaker lets a probe through; its success closes it.
	r.up.ClearFaults()
	waitFor(t, "half-open", func() bool { return r.breakerState() == 1 })
	probe := r.complete(greedy("the probe"))
	require.Equal(t, http.StatusOK, probe.status, "probe: %s", probe.body)
	require.Equal(t, proxy.OutcomeMiss, probe.cache(), "probe: %s", probe.body)
	s = r.breakerState()
	assert.Equal(t, float64(0), s, "after a good probe: state %v, want 0 (closed)", s)
	got := r.complete(greedy("after closing"))
	assert.Equal(t, http.StatusOK, got.status, "after closing: %d", got.status)
}

func TestRetriesHonourRetryAfter(t *testing.T) {
	now := time.Date(2026, 5, 6, 7, 8, 9, 0, time.UTC)
	tests := []struct {
		name       string
		status     int
		retryAfter string
		wait       time.Duration
	}{
		{"429 delay-seconds", 429, "2", 2 * time.Second},
		{"503 delay-seconds", 503, "1", time.Second},
		{"429 HTTP-date", 429, now.Add(4 * time.Second).Format(http.TimeFormat), 4 * time.Second},
		{"503 zero", 503, "0", 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			sl := &sleeps{}
			r := newRig(t, withResilience(breaker.Settings{}, retry.Policy{Attempts: 3}, sl), func(o *proxy.Options) {
				o.Now = func() time.Time { return now }
			})
			r.up.FailNext(2, upstreamtest.Fault{Status: tt.status, RetryAfter: tt.retryAfter})
			got := r.complete(greedy("patience"))
			require.Equal(t, http.StatusOK, got.status, "status %d, want 200 after two retries: %s", got.status, got.body)
			n := r.upstreamGenerations()
			assert.Equal(t, 3, n, "upstream calls %d, want 3", n)
			w := sl.waits()
			assert.True(t, slices.Equal(w, []time.Duration{tt.wait, tt.wait}), "waits %v, want the Retry-After %v twice", w, tt.wait)
			assert.Equal(t, float64(2), r.metric("stint_upstream_retries_total", "upstream", "fake", "reason", strconv.Itoa(tt.status)), "retries metric")
		})
	}
}

func TestRetryBackoffAndLimits(t *testing.T) {
	pol := retry.Policy{Attempts: 4, Base: 100 * time.Millisecond, MaxDelay: 250 * time.Millisecond}
	tests := []struct {
		name      string
		fault     upstreamtest.Fault
		failures  int
		timeout   time.Duration
		wantCalls int
		status    int
		waits     int
	}{
		{"502 three times, then an answer", upstreamtest.Fault{Status: 502}, 3, 0, 4, 200, 3},
		{"connection reset before any byte is retried", upstreamtest.Fault{Reset: true}, 1, 0, 2, 200, 1},
		{"attempts run out: the last failure is passed through", upstreamtest.Fault{Status: 504}, 9, 0, 4, 504, 3},
		{"500 is not retried", upstreamtest.Fault{Status: 500}, 1, 0, 1, 500, 0},
		{"400 is not retried", upstreamtest.Fault{Status: 400}, 1, 0, 1, 400, 0},
		{"a Retry-After above max_delay is passed through", upstreamtest.Fault{Status: 429, RetryAfter: "9"}, 1, 0, 1, 429, 0},
		{"a Retry-After past the deadline is not waited for", upstreamtest.Fault{Status: 503, RetryAfter: "2"}, 1, 2 * time.Second, 1, 503, 0},
		{"a stream cut after it began is not retried", upstreamtest.Fault{Cut: 2}, 1, 0, 1, 200, 0},
		// The routed upstream's timeout bounds the retries too: a hang uses
		// it up, so the client gets 504 and no retry is made past it.
		{"a hang to the timeout is not retried past it", upstreamtest.Fault{Hang: true}, 9, 300 * time.Millisecond, 1, 504, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			sl := &sleeps{}
			p := pol
			if tt.name == "a Retry-After past the deadline is not waited for" {
				p.MaxDelay = 10 * time.Second
			}
			r := newRig(t, withResilience(breaker.Settings{Off: true}, p, sl), func(o *proxy.Options) {
				if tt.timeout > 0 {
					o.Upstreams[0].Timeout = tt.timeout
				}
			})
			r.up.FailNext(tt.failures, tt.fault)
			body := greedy("the weir gate", "stream", tt.fault.Cut > 0)
			got := r.complete(body)
			require.Equal(t, tt.status, got.status, "status %d, want %d: %s", got.status, tt.status, got.body)
			assert.False(t, tt.fault.Cut > 0 && got.readErr == nil, "the cut stream reached the client whole")
			n := r.upstreamGenerations()
			assert.Equal(t, tt.wantCalls, n, "upstream calls %d, want %d", n, tt.wantCalls)
			w := sl.waits()
			require.Len(t, w, tt.waits, "waits %v, want %d", w, tt.waits)
			for n, d := range w {
				// Full jitter: retry n waits within [0, min(cap, base·2^n)].
				ceil := min(p.MaxDelay, p.Base<<n)
				assert.GreaterOrEqual(t, d, time.Duration(0), "wait %d = %v, outside [0, %v]", n, d, ceil)
				assert.LessOrEqual(t, d, ceil, "wait %d = %v, outside [0, %v]", n, d, ceil)
			}
			assert.False(t, tt.status == 429 && got.header.Get("Retry-After") != "9", "Retry-After %q, want the upstream's 9", got.header.Get("Retry-After"))
		})
	}
}

func TestRetryWaitEndsWhenTheClientLeaves(t *testing.T) {
	noLeaks(t)
	started, ended := make(chan struct{}, 1), make(chan error, 1)
	r := newRig(t, withResilience(breaker.Settings{}, retry.Policy{Attempts: 5, MaxDelay: time.Minute}, nil), func(o *proxy.Options) {
		o.Sleep = func(ctx context.Context, d time.Duration) error {
			started <- struct{}{}
			<-ctx.Done() // a long Retry-After: only the client leaving ends it
			ended <- ctx.Err()
			return ctx.Err()
		}
	})
	r.up.FailRatio(1, upstreamtest.Fault{Status: 503, RetryAfter: "10"})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	raw, _ := json.Marshal(greedy("nobody waits ten seconds"))
	req, _ := http.NewRequestWithContext(ctx, http.MethodPost, r.srv.URL+"/v1/completions", bytes.NewReader(raw))
	done := make(chan error, 1)
	go func() {
		resp, err := http.DefaultClient.Do(req)
		if err == nil {
			resp.Body.Close()
		}
		done <- err
	}()
	select {
	case <-started:
	case <-time.After(20 * time.Second):
		require.Fail(t, "no retry wait began")
	}
	cancel() // the client gives up during the wait
	err := <-done
	require.ErrorIs(t, err, context.Canceled, "client call: %v, want its own cancellation", err)
	select {
	case <-ended:
	case <-time.After(20 * time.Second):
		require.Fail(t, "the retry wait went on after the client left")
	}
	n := r.upstreamGenerations()
	assert.Equal(t, 1, n, "upstream calls %d, want 1 (no retry once the client left)", n)
}

func TestRetriedCallsAreChargedConservatively(t *testing.T) {
	tests := []struct {
		name  string
		fault upstreamtest.Fault
		// billed: the failed attempt may have reached the provider, so it is
		// charged its whole reservation.
		billed bool
	}{
		{"503 answer costs nothing", upstreamtest.Fault{Status: 503}, false},
		{"reset after sending is charged its reservation", upstreamtest.Fault{Reset: true}, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, 1)})
			sl := &sleeps{}
			r2 := newRigOn(t, r.rig, withResilience(breaker.Settings{}, retry.Policy{Attempts: 2}, sl))
			r2.up.FailNext(1, tt.fault)
			got := r2.complete(greedy("who pays for the retry"))
			require.Equal(t, http.StatusOK, got.status, "status %d: %s", got.status, got.body)
			c := decodeCompletion(t, got.body)
			answer := billedNanos(c.Usage.PromptTokens, c.Usage.CompletionTokens)
			cost := headerNanos(t, got.header, proxy.HeaderCost)
			left := headerNanos(t, got.header, proxy.HeaderBudgetLeft)
			assert.Equal(t, int64(budget.Nanos(1e9)), cost+left, "cost %d + left %d != the $1 budget: the header does not show every charge", cost, left)
			assert.False(t, tt.billed && cost <= answer, "cost %d, want more than the answer's %d (the failed attempt's reservation)", cost, answer)
			assert.False(t, !tt.billed && cost != answer, "cost %d, want exactly the answer's %d", cost, answer)
		})
	}
}

func TestFallbackWhenTheBreakerIsOpen(t *testing.T) {
	tests := []struct {
		name     string
		models   []string // the fallback's
		want     int
		fallback float64
	}{
		{"serves the model", nil, http.StatusOK, 1},
		{"does not serve the model", []string{"ledger-*"}, http.StatusServiceUnavailable, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			second := upstreamtest.New(upstreamtest.Options{Key: upstreamKey})
			t.Cleanup(second.Close)
			r := newRig(t, withResilience(breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1}, noRetries, nil), func(o *proxy.Options) {
				o.Upstreams[0].Fallback = []string{"second"}
				o.Upstreams = append(o.Upstreams, proxy.Upstream{Name: "second", BaseURL: second.URL(), Key: upstreamKey, Models: tt.models})
			})
			r.up.FailRatio(1, upstreamtest.Fault{Status: 500})
			r.complete(greedy("first failure"))
			r.complete(greedy("second failure"))
			got := r.complete(greedy("sent elsewhere"))
			require.Equal(t, tt.want, got.status, "status %d, want %d: %s", got.status, tt.want, got.body)
			n := second.Calls().Completions
			assert.Equal(t, int(tt.fallback), n, "fallback calls %d, want %v", n, tt.fallback)
			n = r.upstreamGenerations()
			assert.Equal(t, 2, n, "first upstream calls %d, want 2", n)
			assert.Equal(t, tt.fallback, r.metric("stint_upstream_fallbacks_total", "from", "fake", "to", "second"), "fallbacks metric")
			if tt.want == http.StatusOK {
				// The fallback's answer is cached under the routed upstream.
				again := r.complete(greedy("sent elsewhere"))
				assert.Equal(t, proxy.OutcomeHit, again.cache(), "repeat: %q, want hit", again.cache())
			}
		})
	}
}

func TestConcurrencyCapHolds(t *testing.T) {
	noLeaks(t)
	const capN, clients = 3, 12
	r := newRig(t, func(o *proxy.Options) { o.Upstreams[0].MaxConcurrent = capN })
	r.up.Block()
	var wg sync.WaitGroup
	statuses := make([]int, clients)
	for i := range clients {
		wg.Go(func() { statuses[i] = r.complete(greedy(fmt.Sprintf("queued call %d", i))).status })
	}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	require.NoError(t, r.up.AwaitHeld(ctx, capN))
	waitFor(t, "the rest queued for a slot", func() bool {
		return r.metric("stint_upstream_slot_waiting", "upstream", "fake") == clients-capN
	})
	held := r.up.Held()
	require.Equal(t, capN, held, "upstream holds %d calls, want %d", held, capN)
	r.up.Release()
	wg.Wait()
	for i, s := range statuses {
		assert.Equal(t, http.StatusOK, s, "client %d: status %d", i, s)
	}
	m := r.up.MaxConcurrent()
	assert.LessOrEqual(t, m, capN, "upstream saw %d calls at once, cap %d", m, capN)
	n := r.upstreamGenerations()
	assert.Equal(t, clients, n, "upstream calls %d, want %d", n, clients)
}

func TestModelsMergeAndSurviveADeadUpstream(t *testing.T) {
	noLeaks(t)
	a := upstreamtest.New(upstreamtest.Options{Models: []string{"quill-small", "shared-model"}})
	t.Cleanup(a.Close)
	b := upstreamtest.New(upstreamtest.Options{Models: []string{"shared-model", "ledger-large"}})
	t.Cleanup(b.Close)
	r := newRig(t, func(o *proxy.Options) {
		o.ModelsTTL = -1
		o.Upstreams = []proxy.Upstream{{Name: "a", BaseURL: a.URL()}, {Name: "b", BaseURL: b.URL()}}
	})
	models := func() (int, []string, string) {
		resp, err := http.Get(r.srv.URL + "/v1/models")
		require.NoError(t, err)
		defer resp.Body.Close()
		var list struct {
			Data []struct {
				ID string `json:"id"`
			} `json:"data"`
		}
		_ = json.NewDecoder(resp.Body).Decode(&list)
		var ids []string
		for _, m := range list.Data {
			ids = append(ids, m.ID)
		}
		return resp.StatusCode, ids, resp.Header.Get(proxy.HeaderModelsMissing)
	}
	code, ids, missing := models()
	require.Equal(t, 200, code, "merged: %d %v missing %q", code, ids, missing)
	require.True(t, slices.Equal(ids, []string{"quill-small", "shared-model", "ledger-large"}), "merged: %d %v missing %q", code, ids, missing)
	require.Equal(t, "", missing, "merged: %d %v missing %q", code, ids, missing)
	b.Close()
	code, ids, missing = models()
	assert.Equal(t, 200, code, "with b down: %d %v missing %q, want a's list and missing b", code, ids, missing)
	assert.True(t, slices.Equal(ids, []string{"quill-small", "shared-model"}), "with b down: %d %v missing %q, want a's list and missing b", code, ids, missing)
	assert.Equal(t, "b", missing, "with b down: %d %v missing %q, want a's list and missing b", code, ids, missing)
	n := r.metric("stint_upstream_model_list_errors_total", "upstream", "b")
	assert.Equal(t, float64(1), n, "model list errors for b = %v, want 1", n)
	a.Close()
	code, _, _ = models()
	assert.Equal(t, http.StatusBadGateway, code, "every upstream down: %d, want 502", code)
}

func TestSharedBreakerAcrossTwoProxies(t *testing.T) {
	noLeaks(t)
	srv := redistest.Start(t)
	settings := breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1}
	withShared := func(o *proxy.Options) {
		st, err := redisstate.New(srv.Client(t), redisstate.Options{Prefix: "shared-test"})
		require.NoError(t, err)
		o.BreakerStore = st
		o.Upstreams[0].Breaker = settings
		o.Upstreams[0].Retry = noRetries
	}
	a := newRig(t, withShared)
	b := newRigOn(t, a, withShared)
	a.up.FailRatio(1, upstreamtest.Fault{Status: 502})
	a.complete(greedy("replica A fails once"))
	a.complete(greedy("replica A fails twice"))
	calls := a.upstreamGenerations()
	got := b.complete(greedy("replica B asks"))
	assertOpenAnswer(t, got, breaker.DefaultOpenFor)
	assert.Equal(t, calls, a.upstreamGenerations(), "replica B called the upstream although A had tripped the shared breaker")
	s := b.breakerState()
	assert.Equal(t, float64(2), s, "B's breaker state metric %v, want 2", s)
	n := a.metric("stint_upstream_breaker_trips_total") + b.metric("stint_upstream_breaker_trips_total")
	assert.Equal(t, float64(1), n, "trips over both replicas %v, want 1", n)
	n = b.metric("stint_upstream_breaker_store_errors_total")
	assert.Equal(t, float64(0), n, "store errors %v", n)
}

// newRigOn builds a second proxy (a replica) in front of base's upstream
// and store, with base's options plus opts.
func newRigOn(t *testing.T, base *rig, opts ...rigOption) *rig {
	t.Helper()
	reg := prometheus.NewRegistry()
	o := proxy.Options{
		Store:      base.store,
		Upstreams:  []proxy.Upstream{{Name: "fake", BaseURL: base.up.URL(), Key: upstreamKey, Timeout: 30 * time.Second}},
		Registerer: reg,
		Gatherer:   reg,
	}
	if base.opts != nil {
		o = *base.opts
		o.Upstreams = slices.Clone(o.Upstreams)
		o.Registerer, o.Gatherer = reg, reg
	}
	for _, fn := range opts {
		fn(&o)
	}
	p, err := proxy.New(o)
	require.NoError(t, err, "proxy.New")
	t.Cleanup(func() { _ = p.Close(context.Background()) })
	srv := httptest.NewServer(p)
	t.Cleanup(srv.Close)
	return &rig{t: t, up: base.up, srv: srv, proxy: p, reg: reg, store: base.store, key: base.key}
}

func TestSharedBreakerWithRedisDownUsesLocalState(t *testing.T) {
	noLeaks(t)
	srv := redistest.Start(t)
	r := newRig(t, func(o *proxy.Options) {
		st, err := redisstate.New(srv.Client(t), redisstate.Options{Timeout: 100 * time.Millisecond})
		require.NoError(t, err)
		o.BreakerStore = st
		o.Upstreams[0].Breaker = breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1}
		o.Upstreams[0].Retry = noRetries
	})
	srv.Stop()
	got := r.complete(greedy("redis is away"))
	require.Equal(t, http.StatusOK, got.status, "with Redis down: %d %s, want the answer", got.status, got.body)
	n := r.metric("stint_upstream_breaker_store_errors_total", "upstream", "fake")
	assert.False(t, n < 1, "store errors %v, want at least 1", n)
	r.up.FailRatio(1, upstreamtest.Fault{Status: 500})
	r.complete(greedy("fails once"))
	r.complete(greedy("fails twice"))
	assertOpenAnswer(t, r.complete(greedy("local state tripped")), breaker.DefaultOpenFor)
}
