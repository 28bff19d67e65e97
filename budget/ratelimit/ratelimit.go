// Package ratelimit limits requests and tokens per minute, per team and per
// upstream, with a queue: a caller that would exceed a limit waits up to a
// maximum, and beyond that is refused with the time after which to retry
// (for a 429 answer's Retry-After, RFC 9110 §10.2.3).
//
// A Limiter is a function of the current time, passed in by the caller.
// Local limits one process with golang.org/x/time/rate; package
// budget/ratelimit/redisrate shares limits across processes on Redis with
// the Generic Cell Rate Algorithm. Both admit the same traffic: over any
// window W, at most Burst + floor(W / Interval) units.
package ratelimit

import (
	"context"
	"errors"
	"fmt"
	"time"
)

// ErrLimited is the sentinel for a request refused because it would wait
// too long; the error is a *LimitedError.
var ErrLimited = errors.New("ratelimit: rate limited")

// ErrTooLarge reports a request for more units than the burst, which no
// wait can admit.
var ErrTooLarge = errors.New("ratelimit: request exceeds the burst")

// ErrBadLimit reports a malformed Limit.
var ErrBadLimit = errors.New("ratelimit: bad limit")

// LimitedError says how long to wait before retrying a refused request.
type LimitedError struct {
	// RetryAfter is the wait the request would have needed: after it, the
	// same request would be admitted at once if nothing else came first.
	RetryAfter time.Duration
}

// Error reports the retry-after duration.
func (e *LimitedError) Error() string {
	return fmt.Sprintf("ratelimit: rate limited, retry after %v", e.RetryAfter)
}

// Unwrap returns ErrLimited.
func (e *LimitedError) Unwrap() error { return ErrLimited }

// Limit is a rate: Rate units (requests or tokens) per Per, with bursts of
// up to Burst units.
type Limit struct {
	Rate int64         // units per Per; must be positive
	Per  time.Duration // typically time.Minute; must be positive
	// Burst is how many units may be taken at once after an idle spell.
	// Zero means Rate (one Per's worth).
	Burst int64
}

// Validate checks l.
func (l Limit) Validate() error {
	switch {
	case l.Rate <= 0:
		return fmt.Errorf("%w: rate %d must be positive", ErrBadLimit, l.Rate)
	case l.Per <= 0:
		return fmt.Errorf("%w: period %v must be positive", ErrBadLimit, l.Per)
	case l.Burst < 0:
		return fmt.Errorf("%w: burst %d must not be negative", ErrBadLimit, l.Burst)
	}
	return nil
}

// Interval returns the emission interval, the time one unit takes to
// replenish: Per / Rate rounded up to the microsecond (the Redis script's
// unit; rounding up never admits more than the configured rate).
func (l Limit) Interval() time.Duration {
	us := l.Per.Microseconds()
	if l.Per%time.Microsecond != 0 {
		us++
	}
	iv := (us + l.Rate - 1) / l.Rate
	return time.Duration(max(iv, 1)) * time.Microsecond
}

// BurstSize returns Burst, or Rate when Burst is zero.
func (l Limit) BurstSize() int64 {
	if l.Burst == 0 {
		return l.Rate
	}
	return l.Burst
}

// Limiter admits units of traffic per key.
type Limiter interface {
	// Reserve takes n units of key's limit lim at time now. It returns the
	// delay after which the units may be used (zero: at once); the caller
	// must wait that long. If the delay would exceed maxWait it takes
	// nothing and returns a *LimitedError. It returns ErrTooLarge if n
	// exceeds the burst. Units taken are not given back if the caller
	// then gives up waiting.
	Reserve(ctx context.Context, now time.Time, key string, lim Limit, n int64, maxWait time.Duration) (time.Duration, error)
}

// Wait takes n units of key's limit from l and sleeps until they may be
// used. It waits at most maxWait, and never past ctx's deadline: if the
// needed wait is longer it returns a *LimitedError at once, without
// waiting. If ctx ends while waiting it returns ctx's error (the units stay
// taken).
func Wait(ctx context.Context, l Limiter, key string, lim Limit, n int64, maxWait time.Duration) error {
	now := time.Now()
	if dl, ok := ctx.Deadline(); ok {
		maxWait = min(maxWait, dl.Sub(now))
	}
	maxWait = max(maxWait, 0)
	d, err := l.Reserve(ctx, now, key, lim, n, maxWait)
	if err != nil || d <= 0 {
		return err
	}
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}
