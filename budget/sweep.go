package budget

import (
	"context"
	"time"
)

// Sweep calls l.Expire with the current time every interval until ctx
// ends, and passes each non-empty batch of expired reservations to
// onExpired (which may be nil), for example to journal them with Outcome
// Expired. Errors from Expire are passed to onError (which may be nil) and
// the sweep goes on. Sweep returns ctx's error; run it in a goroutine of a
// component that owns ctx. Several replicas may sweep the same store: each
// expired reservation reaches exactly one of them.
func Sweep(ctx context.Context, l Ledger, interval time.Duration, onExpired func([]Reservation), onError func(error)) error {
	t := time.NewTicker(interval)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case now := <-t.C:
			expired, err := l.Expire(ctx, now)
			if len(expired) > 0 && onExpired != nil {
				onExpired(expired)
			}
			if err != nil && onError != nil && ctx.Err() == nil {
				onError(err)
			}
		}
	}
}
