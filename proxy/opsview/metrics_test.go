package opsview

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// histogramOf observes xs in a real Prometheus histogram with buckets and
// returns what it exports.
func histogramOf(t *testing.T, buckets []float64, xs ...float64) *dto.Histogram {
	t.Helper()
	h := prometheus.NewHistogram(prometheus.HistogramOpts{Name: "h", Buckets: buckets})
	for _, x := range xs {
		h.Observe(x)
	}
	var m dto.Metric
	require.NoError(t, h.Write(&m))
	return m.GetHistogram()
}

// TestQuantileFollowsHistogramQuantile checks the estimate against values
// worked out by hand with the rule Prometheus documents for
// histogram_quantile: linear interpolation inside the bucket holding the
// rank, from 0 for the first bucket, the highest finite bound past it.
func TestQuantileFollowsHistogramQuantile(t *testing.T) {
	buckets := []float64{0.1, 0.2, 0.4}
	// 2 in (0, 0.1], 4 in (0.1, 0.2], 4 in (0.2, 0.4].
	ten := []float64{0.05, 0.06, 0.15, 0.15, 0.15, 0.15, 0.3, 0.3, 0.3, 0.3}
	tests := []struct {
		name string
		xs   []float64
		q    float64
		want float64
	}{
		{"median", ten, 0.5, 0.1 + 0.1*3/4},
		{"p95", ten, 0.95, 0.2 + 0.2*3.5/4},
		{"p10 in the first bucket", ten, 0.1, 0.1 * 1 / 2},
		{"past the last bound", append(append([]float64{}, ten...), 9, 9), 0.95, 0.4},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var h histogram
			h.add(histogramOf(t, buckets, tt.xs...))
			got := h.quantile(tt.q)
			if assert.NotNil(t, got, "quantile(%v) = %v, want %v", tt.q, got, tt.want) {
				assert.False(t, math.Abs(*got-tt.want) > 1e-12, "quantile(%v) = %v, want %v", tt.q, got, tt.want)
			}
		})
	}
	var empty histogram
	empty.add(histogramOf(t, buckets))
	assert.Nil(t, empty.quantile(0.5), "quantile of nothing, want nil")
}

// TestHistogramsAddAcrossEndpoints: an upstream's latency is the sum of
// its per-endpoint histograms.
func TestHistogramsAddAcrossEndpoints(t *testing.T) {
	buckets := []float64{0.1, 0.2, 0.4}
	var h histogram
	h.add(histogramOf(t, buckets, 0.05, 0.05))
	h.add(histogramOf(t, buckets, 0.3, 0.3))
	require.Equal(t, uint64(4), h.count, "count %d sum %v, want 4 and 0.7", h.count, h.sum)
	require.False(t, math.Abs(h.sum-0.7) > 1e-12, "count %d sum %v, want 4 and 0.7", h.count, h.sum)
	// Rank 2 of 4 is the last of the first bucket.
	got := h.quantile(0.5)
	if assert.NotNil(t, got, "median %v, want 0.1", got) {
		assert.False(t, math.Abs(*got-0.1) > 1e-12, "median %v, want 0.1", got)
	}
}
