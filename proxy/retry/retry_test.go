package retry_test

import (
	"math/rand/v2"
	"net/http"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/retry"
)

func TestRetryAfter(t *testing.T) {
	now := time.Date(2026, 3, 4, 5, 6, 7, 0, time.UTC)
	tests := []struct {
		name   string
		header string
		want   time.Duration
		ok     bool
	}{
		{"absent", "", 0, false},
		// RFC 9110 §10.2.3: Retry-After = HTTP-date / delay-seconds.
		{"delay-seconds", "120", 120 * time.Second, true},
		{"zero seconds", "0", 0, true},
		{"spaces around", " 3 ", 3 * time.Second, true},
		// The RFC's own example date (IMF-fixdate), taken relative to now.
		{"HTTP-date in the future", now.Add(90 * time.Second).Format(http.TimeFormat), 90 * time.Second, true},
		{"HTTP-date in the past", "Fri, 31 Dec 1999 23:59:59 GMT", 0, true},
		{"obsolete RFC 850 date", now.Add(time.Minute).Format(time.RFC850), time.Minute, true},
		{"negative", "-1", 0, false},
		{"fraction", "1.5", 0, false},
		{"garbage", "soon", 0, false},
		{"overflow", "99999999999999999999", 0, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := http.Header{}
			if tt.header != "" {
				h.Set("Retry-After", tt.header)
			}
			got, ok := retry.RetryAfter(h, now)
			assert.Equal(t, tt.want, got, "RetryAfter(%q) wait", tt.header)
			assert.Equal(t, tt.ok, ok, "RetryAfter(%q) ok", tt.header)
		})
	}
}

func TestBackoffStaysWithinFullJitterBounds(t *testing.T) {
	p := retry.Policy{Base: 100 * time.Millisecond, MaxDelay: time.Second}
	wantCeil := []time.Duration{100, 200, 400, 800, 1000, 1000, 1000}
	r := rand.New(rand.NewPCG(1, 2))
	for n, ms := range wantCeil {
		ceil := ms * time.Millisecond
		got := p.Ceiling(n)
		require.Equal(t, ceil, got, "Ceiling(%d) = %v, want %v", n, got, ceil)
		var lo, hi time.Duration = ceil, 0
		for range 2000 {
			d := p.Backoff(n, r)
			require.GreaterOrEqual(t, d, time.Duration(0), "Backoff(%d) = %v, outside [0, %v]", n, d, ceil)
			require.LessOrEqual(t, d, ceil, "Backoff(%d) = %v, outside [0, %v]", n, d, ceil)
			lo, hi = min(lo, d), max(hi, d)
		}
		// Full jitter spreads over the whole range, not just near the top.
		assert.LessOrEqual(t, lo, ceil/10, "retry %d: 2000 draws span [%v, %v] of [0, %v]", n, lo, hi, ceil)
		assert.GreaterOrEqual(t, hi, ceil*9/10, "retry %d: 2000 draws span [%v, %v] of [0, %v]", n, lo, hi, ceil)
	}
	got := p.Ceiling(200)
	assert.Equal(t, time.Second, got, "Ceiling(200) = %v, want the cap (no overflow)", got)
}

func TestNextPrefersRetryAfterUpToTheCap(t *testing.T) {
	p := retry.Policy{MaxDelay: 10 * time.Second}
	r := rand.New(rand.NewPCG(3, 4))
	now := time.Now()
	h := http.Header{"Retry-After": {"7"}}
	d, ok := p.Next(0, h, now, r)
	if assert.True(t, ok, "Retry-After 7: got %+v %v", d, ok) {
		assert.Equal(t, 7*time.Second, d.Wait, "Retry-After 7: got %+v %v", d, ok)
		assert.True(t, d.FromHeader, "Retry-After 7: got %+v %v", d, ok)
	}
	h.Set("Retry-After", "11")
	d, ok = p.Next(0, h, now, r)
	if assert.False(t, ok, "Retry-After above the cap: got %+v %v, want not ok", d, ok) {
		assert.Equal(t, 11*time.Second, d.Wait, "Retry-After above the cap: got %+v %v, want not ok", d, ok)
	}
	d, ok = p.Next(2, nil, now, r)
	if assert.True(t, ok, "no header: got %+v %v", d, ok) {
		assert.False(t, d.FromHeader, "no header: got %+v %v", d, ok)
		assert.LessOrEqual(t, d.Wait, p.Ceiling(2), "no header: got %+v %v", d, ok)
	}
}

func TestMaxAttempts(t *testing.T) {
	for _, tt := range []struct{ in, want int }{{0, retry.DefaultAttempts}, {-1, 1}, {1, 1}, {5, 5}} {
		got := (retry.Policy{Attempts: tt.in}).MaxAttempts()
		assert.Equal(t, tt.want, got, "Attempts %d: MaxAttempts = %d, want %d", tt.in, got, tt.want)
	}
}

func TestBudgetPaysRetriesFromCalls(t *testing.T) {
	tests := []struct {
		name    string
		share   float64
		reserve int
		calls   int // calls made first, each adding its share
		want    int // retries then allowed
	}{
		{"full reserve, no calls", 0.1, 5, 0, 5},
		{"calls do not overfill it", 0.1, 5, 100, 5},
		{"a share of each call", 0.25, 1, 0, 1},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			b := retry.NewBudget(tt.share, tt.reserve)
			for range tt.calls {
				b.Called()
			}
			got := 0
			for b.Retry() {
				got++
			}
			assert.Equal(t, tt.want, got, "retries allowed = %d, want %d", got, tt.want)
		})
	}
	// Emptied, it refills by share per call: four calls at 0.25 pay one.
	b := retry.NewBudget(0.25, 1)
	b.Retry()
	for i := range 4 {
		require.False(t, b.Retry(), "a retry after %d calls, want one only after 4", i)
		b.Called()
	}
	assert.True(t, b.Retry(), "no retry after four calls at a share of 0.25")
	var none *retry.Budget
	assert.True(t, none.Retry(), "a nil Budget refused a retry")
	p := (retry.Policy{BudgetReserve: -1})
	assert.Nil(t, p.Budget(), "BudgetReserve -1 made a budget")
}
