package ratelimit_test

import (
	"context"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

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
		assert.Equal(t, tt.want, tt.lim.Interval(), "%+v.Interval()", tt.lim)
	}
}

func TestValidate(t *testing.T) {
	for _, lim := range []ratelimit.Limit{{Rate: 0, Per: time.Minute}, {Rate: 5, Per: 0}, {Rate: 5, Per: time.Minute, Burst: -1}} {
		assert.ErrorIs(t, lim.Validate(), ratelimit.ErrBadLimit, "%+v.Validate()", lim)
	}
}

// TestWait drives Wait on the real clock; it checks outcomes, not times.
func TestWait(t *testing.T) {
	lim := ratelimit.Limit{Rate: 1, Per: time.Hour, Burst: 1}
	l := &ratelimit.Local{}
	ctx := context.Background()
	require.NoError(t, ratelimit.Wait(ctx, l, "lab", lim, 1, 0), "first Wait")
	// The next unit is an hour away: refused at once with maxWait 0 ...
	var le *ratelimit.LimitedError
	require.ErrorAs(t, ratelimit.Wait(ctx, l, "lab", lim, 1, 0), &le, "Wait over the limit")
	assert.Greater(t, le.RetryAfter, 59*time.Minute, "retry after about an hour")
	assert.LessOrEqual(t, le.RetryAfter, time.Hour, "retry after about an hour")
	// ... and refused when the wait would pass the context's deadline,
	// although maxWait would allow it.
	dctx, cancel := context.WithTimeout(ctx, time.Minute)
	defer cancel()
	assert.ErrorIs(t, ratelimit.Wait(dctx, l, "lab", lim, 1, 2*time.Hour), ratelimit.ErrLimited, "Wait past the deadline")
	// A short queue is waited out.
	fast := ratelimit.Limit{Rate: 1000, Per: time.Second, Burst: 1}
	require.NoError(t, ratelimit.Wait(ctx, l, "fast", fast, 1, time.Second))
	assert.NoError(t, ratelimit.Wait(ctx, l, "fast", fast, 1, time.Second), "queued Wait, after a millisecond's wait")
	// A cancelled context ends the wait.
	cctx, cancel2 := context.WithCancel(ctx)
	slow := ratelimit.Limit{Rate: 1, Per: time.Minute, Burst: 1}
	require.NoError(t, ratelimit.Wait(ctx, l, "slow", slow, 1, 0))
	cancel2()
	assert.ErrorIs(t, ratelimit.Wait(cctx, l, "slow", slow, 1, 2*time.Minute), context.Canceled, "Wait with a cancelled context")
}
