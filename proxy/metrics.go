package proxy

import (
	"sync"

	"github.com/prometheus/client_golang/prometheus"
)

// metrics are the proxy's Prometheus collectors. Labels never carry keys or
// prompt text.
type metrics struct {
	requests        *prometheus.CounterVec   // team, endpoint, cache outcome
	prompts         *prometheus.CounterVec   // team, outcome (hit|miss)
	upstreamCalls   *prometheus.CounterVec   // upstream, endpoint, status class
	upstreamSeconds *prometheus.HistogramVec // upstream, endpoint
	requestSeconds  *prometheus.HistogramVec // endpoint, cache outcome
	storeErrors     *prometheus.CounterVec   // op
	coalesceWaiting prometheus.GaugeFunc
	pendingWrites   prometheus.GaugeFunc
	remoteWaiting   prometheus.GaugeFunc
	degraded        prometheus.Counter
	tokens          *prometheus.CounterVec // team, kind (prompt|completion), source (upstream|cache)

	// outcomes caches the series one request touches, by (team, endpoint,
	// outcome): looking labels up hashes them, and that showed on cache hits.
	outcomes sync.Map // outcomeKey → *outcomeSeries
}

type outcomeKey struct{ team, endpoint, outcome string }

// outcomeSeries are the series a request with one (team, endpoint, outcome)
// updates.
type outcomeSeries struct {
	requests         prometheus.Counter
	seconds          prometheus.Observer
	promptTokens     prometheus.Counter
	completionTokens prometheus.Counter
	// hitPrompts is the team's prompts{outcome="hit"} series.
	hitPrompts prometheus.Counter
}

func (m *metrics) series(team, endpoint, outcome string) *outcomeSeries {
	k := outcomeKey{team, endpoint, outcome}
	if s, ok := m.outcomes.Load(k); ok {
		return s.(*outcomeSeries)
	}
	source := "cache"
	if outcome == OutcomeMiss || outcome == OutcomeBypass {
		source = "upstream"
	}
	s := &outcomeSeries{
		requests:         m.requests.WithLabelValues(team, endpoint, outcome),
		seconds:          m.requestSeconds.WithLabelValues(endpoint, outcome),
		promptTokens:     m.tokens.WithLabelValues(team, "prompt", source),
		completionTokens: m.tokens.WithLabelValues(team, "completion", source),
		hitPrompts:       m.prompts.WithLabelValues(team, "hit"),
	}
	got, _ := m.outcomes.LoadOrStore(k, s)
	return got.(*outcomeSeries)
}

func newMetrics(reg prometheus.Registerer, waiting, pending, remote func() float64) (*metrics, error) {
	m := &metrics{
		requests: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_requests_total", Help: "Generation requests answered, by team, endpoint and cache outcome (hit, shared, partial, miss, bypass, replay: the Cache-Status header's hit, collapsed, fwd=partial, fwd=miss or request, fwd=bypass, detail=replay).",
		}, []string{"team", "endpoint", "cache"}),
		prompts: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_prompts_total", Help: "Prompt items looked up in the cache (a batched request counts each prompt), by outcome.",
		}, []string{"team", "outcome"}),
		upstreamCalls: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_calls_total", Help: "Calls sent upstream, by upstream, endpoint and status (or error kind).",
		}, []string{"upstream", "endpoint", "status"}),
		upstreamSeconds: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "stint_upstream_seconds", Help: "Upstream call latency until the full answer was read.",
			Buckets: prometheus.ExponentialBuckets(0.001, 2.5, 14),
		}, []string{"upstream", "endpoint"}),
		requestSeconds: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "stint_request_seconds", Help: "Time to answer a generation request, by endpoint and cache outcome.",
			Buckets: prometheus.ExponentialBuckets(0.0001, 3, 14),
		}, []string{"endpoint", "cache"}),
		storeErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_store_errors_total", Help: "Cache store operations that failed (the request was served without the cache).",
		}, []string{"op"}),
		coalesceWaiting: prometheus.NewGaugeFunc(prometheus.GaugeOpts{
			Name: "stint_coalesced_waiting", Help: "Requests waiting on an identical in-flight upstream call.",
		}, waiting),
		pendingWrites: prometheus.NewGaugeFunc(prometheus.GaugeOpts{
			Name: "stint_store_pending_writes", Help: "Answers already sent whose store write has not landed yet.",
		}, pending),
		remoteWaiting: prometheus.NewGaugeFunc(prometheus.GaugeOpts{
			Name: "stint_coalesced_remote_waiting", Help: "Requests waiting on an identical upstream call another replica is making (shared store).",
		}, remote),
		degraded: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "stint_store_degraded_requests_total", Help: "Requests answered without the cache store because it failed (their answers carry Cache-Status detail=store-unavailable).",
		}),
		tokens: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_tokens_total", Help: "Tokens in answers, by team, kind and source (upstream or cache).",
		}, []string{"team", "kind", "source"}),
	}
	if reg == nil {
		return m, nil
	}
	for _, c := range []prometheus.Collector{m.requests, m.prompts, m.upstreamCalls, m.upstreamSeconds, m.requestSeconds, m.storeErrors, m.coalesceWaiting, m.pendingWrites, m.remoteWaiting, m.degraded, m.tokens} {
		if err := reg.Register(c); err != nil {
			return nil, err
		}
	}
	return m, nil
}
