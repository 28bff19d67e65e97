package proxy

import (
	"github.com/prometheus/client_golang/prometheus"
)

// resilienceMetrics are the breaker, retry and fallback collectors.
type resilienceMetrics struct {
	state       *breakerStateCollector // stint_upstream_breaker_state{upstream}
	trips       *prometheus.CounterVec // upstream
	storeErrors *prometheus.CounterVec // upstream
	retries     *prometheus.CounterVec // upstream, reason
	denied      *prometheus.CounterVec // upstream
	fallbacks   *prometheus.CounterVec // from, to
	modelErrors *prometheus.CounterVec // upstream
	slotWaiting *prometheus.GaugeVec   // upstream
}

func newResilienceMetrics(reg prometheus.Registerer, ups []Upstream) (*resilienceMetrics, error) {
	m := &resilienceMetrics{
		state: &breakerStateCollector{ups: ups, desc: prometheus.NewDesc("stint_upstream_breaker_state",
			"Circuit breaker state of each upstream: 0 closed, 1 half-open, 2 open (the shared state when replicas share it).",
			[]string{"upstream"}, nil)},
		trips: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_breaker_trips_total", Help: "Times this process opened an upstream's circuit breaker (summed over replicas, the trips of a shared breaker).",
		}, []string{"upstream"}),
		storeErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_breaker_store_errors_total", Help: "Failures to reach the shared breaker state; the replica used its own state meanwhile.",
		}, []string{"upstream"}),
		retries: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_retries_total", Help: "Upstream calls retried, by upstream and reason (the status, timeout or transport).",
		}, []string{"upstream", "reason"}),
		denied: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_retries_denied_total", Help: "Retries after a 429 not made because the upstream's retry budget was spent; the client got the 429.",
		}, []string{"upstream"}),
		fallbacks: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_fallbacks_total", Help: "Calls sent to a fallback upstream because the routed one's breaker was open.",
		}, []string{"from", "to"}),
		modelErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "stint_upstream_model_list_errors_total", Help: "Upstreams left out of a merged /v1/models answer because their list failed.",
		}, []string{"upstream"}),
		slotWaiting: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "stint_upstream_slot_waiting", Help: "Calls waiting for a slot under an upstream's max_concurrent cap.",
		}, []string{"upstream"}),
	}
	if reg == nil {
		return m, nil
	}
	for _, c := range []prometheus.Collector{m.state, m.trips, m.storeErrors, m.retries, m.denied, m.fallbacks, m.modelErrors, m.slotWaiting} {
		if err := reg.Register(c); err != nil {
			return nil, err
		}
	}
	return m, nil
}

// breakerStateCollector reads each breaker's state when scraped, so the
// gauge is current even when no request has asked lately.
type breakerStateCollector struct {
	ups  []Upstream
	desc *prometheus.Desc
}

// Describe implements prometheus.Collector.
func (c *breakerStateCollector) Describe(ch chan<- *prometheus.Desc) { ch <- c.desc }

// Collect implements prometheus.Collector: one gauge per upstream.
func (c *breakerStateCollector) Collect(ch chan<- prometheus.Metric) {
	for i := range c.ups {
		u := &c.ups[i]
		if u.rt == nil {
			continue
		}
		st, _ := u.rt.breaker.State()
		ch <- prometheus.MustNewConstMetric(c.desc, prometheus.GaugeValue, float64(st), u.Name)
	}
}
