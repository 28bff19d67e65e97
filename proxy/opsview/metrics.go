package opsview

import (
	"math"
	"slices"
	"strings"

	dto "github.com/prometheus/client_model/go"
)

// Metric names the page reads. The breaker's are exported by the proxy's
// circuit breaker; without them an upstream shows "no breaker".
const (
	metricRequests      = "stint_requests_total"
	metricUpstreamCalls = "stint_upstream_calls_total"
	metricUpstreamTime  = "stint_upstream_seconds"
	metricBreakerState  = "stint_upstream_breaker_state"
	metricBreakerTrips  = "stint_upstream_breaker_trips_total"
)

// breakerState names a value of the breaker gauge.
func breakerState(v float64) string {
	switch v {
	case 0:
		return "closed"
	case 1:
		return "half-open"
	case 2:
		return "open"
	}
	return "unknown"
}

// fromMetrics reads the request and upstream figures from the gatherer.
func (v *View) fromMetrics() (CacheView, []UpstreamView) {
	cv := CacheView{}
	for _, o := range outcomeOrder() {
		cv.Outcomes = append(cv.Outcomes, OutcomeView{Outcome: o})
	}
	if v.o.Gatherer == nil {
		return cv, v.upstreamLines(nil)
	}
	mfs, err := v.o.Gatherer.Gather()
	if err != nil && len(mfs) == 0 {
		cv.Error = "metrics: " + err.Error()
		return cv, v.upstreamLines(nil)
	}
	cv.On = true
	fams := map[string]*dto.MetricFamily{}
	for _, mf := range mfs {
		fams[mf.GetName()] = mf
	}
	if mf := fams[metricRequests]; mf != nil {
		for _, m := range mf.GetMetric() {
			n := int64(m.GetCounter().GetValue())
			cv.Requests += n
			o := label(m, "cache")
			i := slices.IndexFunc(cv.Outcomes, func(ov OutcomeView) bool { return ov.Outcome == o })
			if i < 0 {
				cv.Outcomes = append(cv.Outcomes, OutcomeView{Outcome: o})
				i = len(cv.Outcomes) - 1
			}
			cv.Outcomes[i].Count += n
		}
	}
	if cv.Requests > 0 {
		for i := range cv.Outcomes {
			cv.Outcomes[i].Share = float64(cv.Outcomes[i].Count) / float64(cv.Requests)
		}
		cv.Avoided = float64(cv.Outcomes[0].Count+cv.Outcomes[1].Count) / float64(cv.Requests)
	}
	return cv, v.upstreamLines(fams)
}

// upstreamLines builds one line per upstream: the configured ones in order,
// then any other the metrics name.
func (v *View) upstreamLines(fams map[string]*dto.MetricFamily) []UpstreamView {
	var out []UpstreamView
	index := map[string]int{}
	line := func(name string) *UpstreamView {
		i, ok := index[name]
		if !ok {
			i = len(out)
			index[name] = i
			out = append(out, UpstreamView{Name: name, Breaker: "none"})
		}
		return &out[i]
	}
	for _, u := range v.o.Upstreams {
		line(u)
	}
	if fams == nil {
		return out
	}
	if mf := fams[metricUpstreamCalls]; mf != nil {
		for _, m := range mf.GetMetric() {
			u := line(label(m, "upstream"))
			n := int64(m.GetCounter().GetValue())
			u.Calls += n
			if !strings.HasPrefix(label(m, "status"), "2") {
				u.Failed += n
			}
		}
	}
	hists := map[string]*histogram{}
	if mf := fams[metricUpstreamTime]; mf != nil {
		for _, m := range mf.GetMetric() {
			name := label(m, "upstream")
			line(name)
			h := hists[name]
			if h == nil {
				h = &histogram{}
				hists[name] = h
			}
			h.add(m.GetHistogram())
		}
	}
	for name, h := range hists {
		u := line(name)
		u.Timed = h.count
		if h.count > 0 {
			mean := h.sum / float64(h.count)
			u.MeanSeconds = &mean
			u.P50Seconds = h.quantile(0.5)
			u.P95Seconds = h.quantile(0.95)
		}
	}
	if mf := fams[metricBreakerState]; mf != nil {
		for _, m := range mf.GetMetric() {
			u := line(label(m, "upstream"))
			u.Breaker = breakerState(m.GetGauge().GetValue())
		}
	}
	if mf := fams[metricBreakerTrips]; mf != nil {
		for _, m := range mf.GetMetric() {
			u := line(label(m, "upstream"))
			n := int64(m.GetCounter().GetValue())
			if u.Trips != nil {
				n += *u.Trips
			}
			u.Trips = &n
		}
	}
	return out
}

func label(m *dto.Metric, name string) string {
	for _, lp := range m.GetLabel() {
		if lp.GetName() == name {
			return lp.GetValue()
		}
	}
	return ""
}

// histogram adds up histograms with the same buckets (one per endpoint).
type histogram struct {
	count  uint64
	sum    float64
	bounds []float64 // upper bounds, ascending, +Inf excluded
	counts []uint64  // cumulative counts at bounds
}

func (h *histogram) add(p *dto.Histogram) {
	h.count += p.GetSampleCount()
	h.sum += p.GetSampleSum()
	for _, b := range p.GetBucket() {
		ub := b.GetUpperBound()
		if math.IsInf(ub, 1) {
			continue
		}
		i, found := slices.BinarySearch(h.bounds, ub)
		if !found {
			h.bounds = slices.Insert(h.bounds, i, ub)
			h.counts = slices.Insert(h.counts, i, 0)
		}
		h.counts[i] += b.GetCumulativeCount()
	}
}

// quantile estimates the q-quantile the way Prometheus's
// histogram_quantile does: find the bucket holding the rank q·count and
// interpolate linearly inside it (from 0 for the first bucket). A rank
// past the last finite bound answers that bound. Nil without samples.
func (h *histogram) quantile(q float64) *float64 {
	if h.count == 0 {
		return nil
	}
	rank := q * float64(h.count)
	lower, below := 0.0, uint64(0)
	for i, ub := range h.bounds {
		if float64(h.counts[i]) >= rank {
			in := h.counts[i] - below
			x := ub
			if in > 0 {
				x = lower + (ub-lower)*(rank-float64(below))/float64(in)
			}
			return &x
		}
		lower, below = ub, h.counts[i]
	}
	if len(h.bounds) == 0 {
		return nil
	}
	x := h.bounds[len(h.bounds)-1]
	return &x
}
