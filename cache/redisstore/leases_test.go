package redisstore_test

import (
	"context"
	"sync"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/internal/redistest"
)

// backends are the Redis deployments the lease tests run on.
func backends(t *testing.T) []struct {
	name   string
	client redis.UniversalClient
} {
	return []struct {
		name   string
		client redis.UniversalClient
	}{
		{"standalone", redistest.Start(t).Client(t)},
		{"cluster", redistest.StartCluster(t, 3).Client(t)},
	}
}

// replicas returns two stores on one prefix, as two proxy processes.
func replicas(t *testing.T, c redis.UniversalClient, opts redisstore.Options) (*redisstore.Store, *redisstore.Store) {
	opts.Prefix = freshPrefix()
	return newStore(t, c, opts), newStore(t, c, opts)
}

// claimAsync runs Claim in a goroutine and reports its result.
type claimResult struct {
	release func(context.Context) error
	err     error
}

func claimAsync(ctx context.Context, s *redisstore.Store, k string) <-chan claimResult {
	ch := make(chan claimResult, 1)
	go func() {
		r, err := s.Claim(ctx, k)
		ch <- claimResult{r, err}
	}()
	return ch
}

// TestClaimWaitsForRelease: with a lease far longer than the test, a
// waiter returns only because the holder released.
func TestClaimWaitsForRelease(t *testing.T) {
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			a, other := replicas(t, b.client, redisstore.Options{LeaseTTL: 5 * time.Minute, LeasePoll: time.Minute})
			ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
			defer cancel()
			k := key(7)
			release, err := a.Claim(ctx, k)
			require.NoError(t, err, "first Claim")
			require.NotNil(t, release, "first Claim: held")
			waiter := claimAsync(ctx, other, k)
			// The waiter is subscribed once the channel has a subscriber.
			awaitSubscribers(t, ctx, b.client, "cache:{"+k+"}:n", 1)
			require.NoError(t, a.Put(ctx, k, []byte("the answer"), 0))
			require.NoError(t, release(ctx), "release")
			assert.NoError(t, release(ctx), "second release")
			r := <-waiter
			require.NoError(t, r.err, "waiter: released before the deadline")
			require.Nil(t, r.release, "waiter: released, not holding")
			v, found, err := other.Get(ctx, k)
			assert.NoError(t, err, "waiter's read after the release")
			assert.True(t, found, "waiter's read after the release")
			assert.Equal(t, "the answer", string(v), "waiter's read after the release")
			// Free again: the next Claim holds.
			rel, err := other.Claim(ctx, k)
			require.NoError(t, err, "Claim after the release")
			require.NotNil(t, rel, "Claim after the release: held")
			_ = rel(ctx)
		})
	}
}

// awaitSubscribers polls PUBSUB SHARDNUMSUB (on the channel's node) until
// channel has n subscribers.
func awaitSubscribers(t *testing.T, ctx context.Context, c redis.UniversalClient, suffix string, n int64) {
	t.Helper()
	for {
		var got int64
		// The prefix differs per test; find the channel by pattern.
		chans, _ := shardChannels(ctx, c)
		for _, ch := range chans {
			if len(ch) >= len(suffix) && ch[len(ch)-len(suffix):] == suffix {
				res, err := c.PubSubShardNumSub(ctx, ch).Result()
				if err == nil {
					got = res[ch]
				}
			}
		}
		if got >= n {
			return
		}
		select {
		case <-ctx.Done():
			require.Failf(t, "subscribers never came", "channel *%s has %d subscribers, want %d", suffix, got, n)
		case <-time.After(10 * time.Millisecond): // polling interval
		}
	}
}

func shardChannels(ctx context.Context, c redis.UniversalClient) ([]string, error) {
	if cc, ok := c.(*redis.ClusterClient); ok {
		var (
			mu  sync.Mutex // guards all: ForEachMaster runs fn on every node at once
			all []string
		)
		err := cc.ForEachMaster(ctx, func(ctx context.Context, n *redis.Client) error {
			chs, err := n.PubSubShardChannels(ctx, "*").Result()
			mu.Lock()
			all = append(all, chs...)
			mu.Unlock()
			return err
		})
		return all, err
	}
	return c.PubSubShardChannels(ctx, "*").Result()
}

// TestClaimAfterHolderDies: a holder that stops renewing (its process is
// gone; here its store is closed) loses the lease after LeaseTTL, and the
// waiter returns so that it can claim.
func TestClaimAfterHolderDies(t *testing.T) {
	for _, b := range backends(t) {
		t.Run(b.name, func(t *testing.T) {
			a, other := replicas(t, b.client, redisstore.Options{LeaseTTL: 300 * time.Millisecond})
			ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
			defer cancel()
			k := key(8)
			release, err := a.Claim(ctx, k)
			require.NoError(t, err, "first Claim")
			require.NotNil(t, release, "first Claim: held")
			_ = a.Close() // stops the renewals, releases nothing
			r := <-claimAsync(ctx, other, k)
			require.NoError(t, r.err, "waiter once the lease expired")
			require.Nil(t, r.release, "waiter once the lease expired: not holding")
			rel, err := other.Claim(ctx, k)
			require.NoError(t, err, "Claim after the holder died")
			require.NotNil(t, rel, "Claim after the holder died: held")
			assert.ErrorIs(t, release(ctx), cache.ErrClosed, "release on a closed store")
			_ = rel(ctx)
		})
	}
}

// TestLeaseIsRenewed: a holder that takes many lease lifetimes keeps the
// lease; a waiter with a deadline shorter than the hold gives up with its
// context's error.
func TestLeaseIsRenewed(t *testing.T) {
	c := redistest.Start(t).Client(t)
	a, other := replicas(t, c, redisstore.Options{LeaseTTL: 600 * time.Millisecond})
	ctx := t.Context()
	release, err := a.Claim(ctx, key(9))
	require.NoError(t, err, "Claim")
	require.NotNil(t, release, "Claim: held")
	defer release(ctx)
	wctx, cancel := context.WithTimeout(ctx, 3*time.Second) // five lease lifetimes
	defer cancel()
	rel, err := other.Claim(wctx, key(9))
	assert.ErrorIs(t, err, context.DeadlineExceeded, "waiter past five lease lifetimes: its deadline (the holder renews)")
	assert.Nil(t, rel, "waiter past five lease lifetimes: not holding")
}

// TestReleaseIsCompareAndDelete: a holder whose lease was lost (expired and
// taken by another) cannot release the other's lease.
func TestReleaseIsCompareAndDelete(t *testing.T) {
	c := redistest.Start(t).Client(t)
	a, other := replicas(t, c, redisstore.Options{LeaseTTL: time.Minute})
	ctx := t.Context()
	k := key(10)
	stale, err := a.Claim(ctx, k)
	require.NoError(t, err, "Claim")
	require.NotNil(t, stale, "Claim: held")
	// The lease runs out (deleted here, as expiry would).
	keys, _ := c.Keys(ctx, "*:cache:{"+k+"}:l").Result()
	require.Len(t, keys, 1, "lease keys %v", keys)
	c.Del(ctx, keys[0])
	fresh, err := other.Claim(ctx, k)
	require.NoError(t, err, "Claim after expiry")
	require.NotNil(t, fresh, "Claim after expiry: held")
	require.NoError(t, stale(ctx), "stale release")
	n, _ := c.Exists(ctx, keys[0]).Result()
	assert.EqualValues(t, 1, n, "a stale holder's release deleted the new holder's lease")
	_ = fresh(ctx)
	n, _ = c.Exists(ctx, keys[0]).Result()
	assert.Zero(t, n, "the holder's release left its lease")
}
