package ratelimit

import (
	"context"
	"fmt"
	"sync"
	"time"

	"golang.org/x/time/rate"
)

// Local is a Limiter for one process, a token bucket per key
// (golang.org/x/time/rate): the bucket holds BurstSize units and refills one
// unit per Interval, which admits the same traffic as GCRA with the same
// parameters. The zero value is ready to use and safe for concurrent use.
type Local struct {
	// guards buckets
	mu sync.Mutex
	// one bucket per key, remade when the key's Limit changes
	buckets map[string]*bucket
}

type bucket struct {
	lim Limit
	l   *rate.Limiter
}

var _ Limiter = (*Local)(nil)

// Reserve implements Limiter.
func (lo *Local) Reserve(ctx context.Context, now time.Time, key string, lim Limit, n int64, maxWait time.Duration) (time.Duration, error) {
	if err := lim.Validate(); err != nil {
		return 0, err
	}
	if n < 0 {
		return 0, fmt.Errorf("%w: negative count %d", ErrBadLimit, n)
	}
	if n > lim.BurstSize() {
		return 0, fmt.Errorf("%w: %d units, burst %d", ErrTooLarge, n, lim.BurstSize())
	}
	if err := ctx.Err(); err != nil {
		return 0, err
	}
	l := lo.limiter(now, key, lim)
	r := l.ReserveN(now, int(n))
	if !r.OK() {
		return 0, fmt.Errorf("%w: %d units, burst %d", ErrTooLarge, n, lim.BurstSize())
	}
	d := r.DelayFrom(now)
	if d > maxWait {
		r.CancelAt(now)
		return 0, &LimitedError{RetryAfter: d}
	}
	return d, nil
}

// limiter returns key's bucket for lim, making or remaking it.
func (lo *Local) limiter(now time.Time, key string, lim Limit) *rate.Limiter {
	lo.mu.Lock()
	defer lo.mu.Unlock()
	if lo.buckets == nil {
		lo.buckets = map[string]*bucket{}
	}
	b := lo.buckets[key]
	if b == nil {
		b = &bucket{lim: lim, l: rate.NewLimiter(rate.Every(lim.Interval()), int(lim.BurstSize()))}
		lo.buckets[key] = b
	} else if b.lim != lim {
		b.l.SetLimitAt(now, rate.Every(lim.Interval()))
		b.l.SetBurstAt(now, int(lim.BurstSize()))
		b.lim = lim
	}
	return b.l
}
