// Package ratelimittest is the conformance suite for ratelimit.Limiter
// implementations, run on injected time so results never depend on timing.
package ratelimittest

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget/ratelimit"
)

// New returns a fresh Limiter with no state, released when t ends.
type New func(t *testing.T) ratelimit.Limiter

// Run runs the suite against the limiters newLimiter makes.
func Run(t *testing.T, newLimiter New) {
	t.Run("WindowBound", func(t *testing.T) { testWindowBound(t, newLimiter) })
	t.Run("Queue", func(t *testing.T) { testQueue(t, newLimiter) })
	t.Run("TooLarge", func(t *testing.T) { testTooLarge(t, newLimiter) })
	t.Run("KeysApart", func(t *testing.T) { testKeysApart(t, newLimiter) })
}

var t0 = time.Date(2026, 6, 1, 9, 0, 0, 0, time.UTC)

// testWindowBound checks the count a saturating client gets admitted over a
// window of injected time against the bound derived from GCRA's
// definition. GCRA is the Generic Cell Rate Algorithm of the ATM Forum
// Traffic Management Specification 4.0 and ITU-T Recommendation I.371
// (neither text is at hand here: the rule below is the virtual-scheduling
// form as recalled, and the bound is derived from it, not quoted). A unit is admitted at time t only if TAT − τ ≤ t, where
// every admission raises TAT by T and τ = Burst·T. Starting idle at t0,
// after k admissions TAT ≥ t0 + k·T, so the k-th admission at t ≤ t0+W
// needs t0 + k·T − Burst·T ≤ t0 + W: at most Burst + floor(W/T) units.
// A client trying every step gets each unit at most one step late, so it
// gets at least that bound minus one.
func testWindowBound(t *testing.T, newLimiter New) {
	tests := []struct {
		name string
		lim  ratelimit.Limit
		n    int64         // units per request
		step time.Duration // the client tries again every step
		win  time.Duration
	}{
		{"600 rpm", ratelimit.Limit{Rate: 600, Per: time.Minute}, 1, 7 * time.Millisecond, time.Minute},
		{"60 rpm burst 5", ratelimit.Limit{Rate: 60, Per: time.Minute, Burst: 5}, 1, 13 * time.Millisecond, 90 * time.Second},
		{"7 per minute", ratelimit.Limit{Rate: 7, Per: time.Minute, Burst: 2}, 1, 100 * time.Millisecond, 5 * time.Minute},
		{"tokens 200k/min, 50 per call", ratelimit.Limit{Rate: 200000, Per: time.Minute}, 50, 3 * time.Millisecond, 20 * time.Second},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			l := newLimiter(t)
			ctx := context.Background()
			var admitted int64
			for now := t0; !now.After(t0.Add(tt.win)); now = now.Add(tt.step) {
				for {
					d, err := l.Reserve(ctx, now, "lab", tt.lim, tt.n, 0)
					if errors.Is(err, ratelimit.ErrLimited) {
						break
					}
					require.NoError(t, err, "Reserve at %v: want admitted at once or ErrLimited", now.Sub(t0))
					require.Zero(t, d, "Reserve at %v: want admitted at once", now.Sub(t0))
					admitted += tt.n
				}
			}
			T := tt.lim.Interval()
			bound := tt.lim.BurstSize() + int64(tt.win/T)
			// Admission happens in whole requests of n units.
			hi := bound - bound%tt.n
			lo := hi - tt.n
			t.Logf("admitted %d, bound [%d, %d]", admitted, lo, hi)
			assert.True(t, lo <= admitted && admitted <= hi, "admitted %d units in %v, want within [%d, %d] (burst %d + floor(%v / %v))",
				admitted, tt.win, lo, hi, tt.lim.BurstSize(), tt.win, T)
		})
	}
}

// testQueue checks the waits a queueing caller is given and that a refusal
// takes nothing.
func testQueue(t *testing.T, newLimiter New) {
	l := newLimiter(t)
	ctx := context.Background()
	lim := ratelimit.Limit{Rate: 60, Per: time.Minute, Burst: 2} // T = 1s
	wants := []time.Duration{0, 0, time.Second, 2 * time.Second, 3 * time.Second}
	for i, want := range wants {
		d, err := l.Reserve(ctx, t0, "lab", lim, 1, 3*time.Second)
		require.NoError(t, err, "request %d", i)
		require.Equal(t, want, d, "request %d: the wait", i)
	}
	_, err := l.Reserve(ctx, t0, "lab", lim, 1, 3*time.Second)
	var le *ratelimit.LimitedError
	require.ErrorAs(t, err, &le, "sixth Reserve")
	require.Equal(t, 4*time.Second, le.RetryAfter, "sixth Reserve's retry-after")
	// The refusal took nothing: four seconds on, the next unit is free.
	d, err := l.Reserve(ctx, t0.Add(4*time.Second), "lab", lim, 1, 0)
	require.NoError(t, err, "Reserve after the retry-after")
	assert.Zero(t, d, "Reserve after the retry-after: want admitted at once")
}

func testTooLarge(t *testing.T, newLimiter New) {
	l := newLimiter(t)
	lim := ratelimit.Limit{Rate: 100, Per: time.Minute}
	_, err := l.Reserve(context.Background(), t0, "lab", lim, 101, time.Hour)
	assert.ErrorIs(t, err, ratelimit.ErrTooLarge, "Reserve above the burst")
	_, err = l.Reserve(context.Background(), t0, "lab", ratelimit.Limit{}, 1, 0)
	assert.ErrorIs(t, err, ratelimit.ErrBadLimit, "Reserve with a zero Limit")
}

func testKeysApart(t *testing.T, newLimiter New) {
	l := newLimiter(t)
	ctx := context.Background()
	lim := ratelimit.Limit{Rate: 1, Per: time.Minute, Burst: 1}
	_, err := l.Reserve(ctx, t0, "lab", lim, 1, 0)
	require.NoError(t, err, "first unit")
	_, err = l.Reserve(ctx, t0, "ops", lim, 1, 0)
	assert.NoError(t, err, "another key's first unit")
	_, err = l.Reserve(ctx, t0, "lab", lim, 1, 0)
	assert.ErrorIs(t, err, ratelimit.ErrLimited, "same key's second unit")
}
