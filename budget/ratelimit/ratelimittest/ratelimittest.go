// Package ratelimittest is the conformance suite for ratelimit.Limiter
// implementations, run on injected time so results never depend on timing.
package ratelimittest

import (
	"context"
	"errors"
	"testing"
	"time"

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
					if err != nil || d != 0 {
						t.Fatalf("Reserve at %v = %v, %v; want admitted at once or ErrLimited", now.Sub(t0), d, err)
					}
					admitted += tt.n
				}
			}
			T := tt.lim.Interval()
			bound := tt.lim.BurstSize() + int64(tt.win/T)
			// Admission happens in whole requests of n units.
			hi := bound - bound%tt.n
			lo := hi - tt.n
			t.Logf("admitted %d, bound [%d, %d]", admitted, lo, hi)
			if admitted > hi || admitted < lo {
				t.Errorf("admitted %d units in %v, want within [%d, %d] (burst %d + floor(%v / %v))",
					admitted, tt.win, lo, hi, tt.lim.BurstSize(), tt.win, T)
			}
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
		if err != nil || d != want {
			t.Fatalf("request %d: Reserve = %v, %v; want wait %v", i, d, err, want)
		}
	}
	_, err := l.Reserve(ctx, t0, "lab", lim, 1, 3*time.Second)
	var le *ratelimit.LimitedError
	if !errors.As(err, &le) || le.RetryAfter != 4*time.Second {
		t.Fatalf("sixth Reserve error = %v, want LimitedError retry after 4s", err)
	}
	// The refusal took nothing: four seconds on, the next unit is free.
	if d, err := l.Reserve(ctx, t0.Add(4*time.Second), "lab", lim, 1, 0); err != nil || d != 0 {
		t.Errorf("Reserve after the retry-after = %v, %v; want admitted at once", d, err)
	}
}

func testTooLarge(t *testing.T, newLimiter New) {
	l := newLimiter(t)
	lim := ratelimit.Limit{Rate: 100, Per: time.Minute}
	if _, err := l.Reserve(context.Background(), t0, "lab", lim, 101, time.Hour); !errors.Is(err, ratelimit.ErrTooLarge) {
		t.Errorf("Reserve above the burst: error = %v, want ErrTooLarge", err)
	}
	if _, err := l.Reserve(context.Background(), t0, "lab", ratelimit.Limit{}, 1, 0); !errors.Is(err, ratelimit.ErrBadLimit) {
		t.Errorf("Reserve with a zero Limit: error = %v, want ErrBadLimit", err)
	}
}

func testKeysApart(t *testing.T, newLimiter New) {
	l := newLimiter(t)
	ctx := context.Background()
	lim := ratelimit.Limit{Rate: 1, Per: time.Minute, Burst: 1}
	if _, err := l.Reserve(ctx, t0, "lab", lim, 1, 0); err != nil {
		t.Fatal(err)
	}
	if _, err := l.Reserve(ctx, t0, "ops", lim, 1, 0); err != nil {
		t.Errorf("another key's first unit: %v, want admitted", err)
	}
	if _, err := l.Reserve(ctx, t0, "lab", lim, 1, 0); !errors.Is(err, ratelimit.ErrLimited) {
		t.Errorf("same key's second unit: %v, want ErrLimited", err)
	}
}
