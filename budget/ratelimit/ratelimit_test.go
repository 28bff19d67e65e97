package ratelimit_test

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/ratelimit/ratelimittest"
)

func TestLocal(t *testing.T) {
	ratelimittest.Run(t, func(t *testing.T) ratelimit.Limiter { return &ratelimit.Local{} })
}

func TestInterval(t *testing.T) {
	tests := []struct {
		lim  ratelimit.Limit
		want time.Duration
	}{
		{ratelimit.Limit{Rate: 600, Per: time.Minute}, 100 * time.Millisecond},
		{ratelimit.Limit{Rate: 200000, Per: time.Minute}, 300 * time.Microsecond},
		{ratelimit.Limit{Rate: 7, Per: time.Minute}, 8571429 * time.Microsecond}, // rounded up
		{ratelimit.Limit{Rate: 1e9, Per: time.Second}, time.Microsecond},         // floor of 1µs
	}
	for _, tt := range tests {
		if got := tt.lim.Interval(); got != tt.want {
			t.Errorf("%+v.Interval() = %v, want %v", tt.lim, got, tt.want)
		}
	}
}

func TestValidate(t *testing.T) {
	for _, lim := range []ratelimit.Limit{{Rate: 0, Per: time.Minute}, {Rate: 5, Per: 0}, {Rate: 5, Per: time.Minute, Burst: -1}} {
		if err := lim.Validate(); !errors.Is(err, ratelimit.ErrBadLimit) {
			t.Errorf("%+v.Validate() = %v, want ErrBadLimit", lim, err)
		}
	}
}

// TestWait drives Wait on the real clock; it checks outcomes, not times.
func TestWait(t *testing.T) {
	lim := ratelimit.Limit{Rate: 1, Per: time.Hour, Burst: 1}
	l := &ratelimit.Local{}
	ctx := context.Background()
	if err := ratelimit.Wait(ctx, l, "lab", lim, 1, 0); err != nil {
		t.Fatalf("first Wait: %v", err)
	}
	// The next unit is an hour away: refused at once with maxWait 0 ...
	var le *ratelimit.LimitedError
	err := ratelimit.Wait(ctx, l, "lab", lim, 1, 0)
	if !errors.As(err, &le) || le.RetryAfter <= 59*time.Minute || le.RetryAfter > time.Hour {
		t.Fatalf("Wait over the limit = %v, want a LimitedError retrying after about an hour", err)
	}
	// ... and refused when the wait would pass the context's deadline,
	// although maxWait would allow it.
	dctx, cancel := context.WithTimeout(ctx, time.Minute)
	defer cancel()
	if err := ratelimit.Wait(dctx, l, "lab", lim, 1, 2*time.Hour); !errors.Is(err, ratelimit.ErrLimited) {
		t.Fatalf("Wait past the deadline = %v, want ErrLimited", err)
	}
	// A short queue is waited out.
	fast := ratelimit.Limit{Rate: 1000, Per: time.Second, Burst: 1}
	if err := ratelimit.Wait(ctx, l, "fast", fast, 1, time.Second); err != nil {
		t.Fatal(err)
	}
	if err := ratelimit.Wait(ctx, l, "fast", fast, 1, time.Second); err != nil {
		t.Fatalf("queued Wait = %v, want nil after a millisecond's wait", err)
	}
	// A cancelled context ends the wait.
	cctx, cancel2 := context.WithCancel(ctx)
	slow := ratelimit.Limit{Rate: 1, Per: time.Minute, Burst: 1}
	if err := ratelimit.Wait(ctx, l, "slow", slow, 1, 0); err != nil {
		t.Fatal(err)
	}
	cancel2()
	if err := ratelimit.Wait(cctx, l, "slow", slow, 1, 2*time.Minute); !errors.Is(err, context.Canceled) {
		t.Fatalf("Wait with a cancelled context = %v, want context.Canceled", err)
	}
}
