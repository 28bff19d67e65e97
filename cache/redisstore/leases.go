package redisstore

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"fmt"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/cache"
)

// releaseLua deletes the lease KEYS[1] if it still holds the token
// ARGV[1] (compare-and-delete: a holder whose lease expired and was taken
// by another cannot delete the other's).
const releaseLua = `
if redis.call('GET', KEYS[1]) == ARGV[1] then
	return redis.call('DEL', KEYS[1])
end
return 0`

// renewLua extends the lease KEYS[1] to ARGV[2] ms if it still holds the
// token ARGV[1].
const renewLua = `
if redis.call('GET', KEYS[1]) == ARGV[1] then
	return redis.call('PEXPIRE', KEYS[1], ARGV[2])
end
return 0`

// releasedNotice is the message published when a lease is released.
const releasedNotice = "released"

// Claim coordinates the fetching of key's answer between every Store
// sharing the Redis and Prefix, so that one of them makes the call.
//
// When no one holds key's lease, Claim takes it (SET NX PX with a random
// token) and returns a release function: the caller fetches the answer,
// stores it, and then calls release. Until then the lease is renewed every
// LeaseTTL/3, so a slow fetch keeps it; if the holder dies, the lease
// expires LeaseTTL later. release deletes the lease only if it is still the
// caller's (compare-and-delete in one script), then publishes a notice on
// key's shard channel (SPUBLISH); it is safe to call more than once.
//
// When another holds the lease, Claim subscribes to key's channel
// (SSUBSCRIBE, one connection per waiting Claim) and waits until the lease
// is released or expires, or ctx ends, checking the lease every LeasePoll
// as well. It then returns a nil release and a nil error: the caller reads
// the store again, and may Claim again if the answer is not there (the
// holder failed or died).
//
// Errors reaching Redis wrap ErrUnavailable, as the Store's do; a caller
// that gets one should go on without the lease.
func (s *Store) Claim(ctx context.Context, key string) (release func(context.Context) error, err error) {
	cctx, cancel, err := s.enter(ctx, key)
	if err != nil {
		return nil, err
	}
	token, err := newToken()
	if err != nil {
		cancel()
		return nil, err
	}
	lk := s.leaseKey(key)
	took, err := s.c.SetNX(cctx, lk, token, s.leaseTTL).Result()
	cancel()
	if err != nil {
		return nil, s.fail(ctx, "claim", key, err)
	}
	s.ok(ctx, key)
	if took {
		return s.hold(key, token), nil
	}
	return nil, s.await(ctx, key)
}

// hold starts renewing the lease of key held with token and returns the
// function that releases it.
func (s *Store) hold(key, token string) func(context.Context) error {
	lk := s.leaseKey(key)
	stop := make(chan struct{})
	s.mu.Lock()
	if s.closed.Load() { // closed since Claim began: leave the lease to expire
		s.mu.Unlock()
		return func(context.Context) error {
			return fmt.Errorf("redisstore: release %.16s…: %w (the lease expires by itself)", key, cache.ErrClosed)
		}
	}
	s.renewals.Add(1)
	s.mu.Unlock()
	go func() {
		defer s.renewals.Done()
		t := time.NewTicker(s.leaseTTL / 3)
		defer t.Stop()
		for {
			select {
			case <-stop:
				return
			case <-s.closeCtx.Done():
				return
			case <-t.C:
				ctx, cancel := s.callCtx(s.closeCtx)
				n, err := s.renewScript.Run(ctx, s.c, []string{lk}, token, s.leaseTTL.Milliseconds()).Int()
				cancel()
				if err == nil && n == 0 {
					return // lost: it expired and may be another's now
				}
			}
		}
	}()
	var once sync.Once
	var result error
	return func(ctx context.Context) error {
		once.Do(func() {
			close(stop)
			if s.closed.Load() {
				result = fmt.Errorf("redisstore: release %.16s…: %w (the lease expires by itself)", key, cache.ErrClosed)
				return
			}
			cctx, cancel := s.callCtx(ctx)
			defer cancel()
			n, err := s.releaseScript.Run(cctx, s.c, []string{lk}, token).Int()
			if err != nil {
				result = s.fail(ctx, "release", key, err)
				return
			}
			if n == 1 {
				if err := s.c.SPublish(cctx, s.channel(key), releasedNotice).Err(); err != nil {
					// Waiters still see the lease gone at their next poll.
					result = s.fail(ctx, "release notice", key, err)
				}
			}
		})
		return result
	}
}

// await waits until the lease of key is gone (released or expired) or ctx
// ends.
func (s *Store) await(ctx context.Context, key string) error {
	lk := s.leaseKey(key)
	sub := s.c.SSubscribe(ctx, s.channel(key))
	defer sub.Close()
	// The first reply confirms the subscription: from here on no release
	// notice is missed, so a lease seen after it is waited on safely.
	subscribed := true
	if _, err := sub.ReceiveTimeout(ctx, s.roundTrip()); err != nil {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		subscribed = false // polling alone still works
	}
	for {
		cctx, cancel := s.callCtx(ctx)
		left, err := s.c.PTTL(cctx, lk).Result()
		cancel()
		if err != nil {
			return s.fail(ctx, "await", key, err)
		}
		// PTTL answers -2 (as a duration of -2ns) for a missing key.
		if left < 0 && left != -1 {
			return nil
		}
		wait := s.leasePoll
		if left > 0 && left < wait {
			wait = left + time.Millisecond
		}
		if !subscribed {
			t := time.NewTimer(wait)
			select {
			case <-t.C:
			case <-ctx.Done():
				t.Stop()
				return ctx.Err()
			}
			continue
		}
		msg, err := sub.ReceiveTimeout(ctx, wait)
		if err != nil {
			if ctx.Err() != nil {
				return ctx.Err()
			}
			continue // a timeout: check the lease again
		}
		if m, ok := msg.(*redis.Message); ok && m.Payload == releasedNotice {
			return nil
		}
	}
}

// callCtx bounds one round trip made under ctx by the store's timeout.
func (s *Store) callCtx(ctx context.Context) (context.Context, context.CancelFunc) {
	if s.timeout > 0 {
		return context.WithTimeout(ctx, s.timeout)
	}
	return context.WithCancel(ctx)
}

// roundTrip is the wait for one reply: the timeout, or a second without one.
func (s *Store) roundTrip() time.Duration {
	if s.timeout > 0 {
		return s.timeout
	}
	return time.Second
}

func newToken() (string, error) {
	var b [16]byte
	if _, err := rand.Read(b[:]); err != nil {
		return "", fmt.Errorf("redisstore: lease token: %w", err)
	}
	return hex.EncodeToString(b[:]), nil
}
