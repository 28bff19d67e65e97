package cache_test

import (
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/internal/redistest"
)

// TestHotStaleIfErrorStandsInForRedis runs two tiers on one real
// redis-server, as two replicas, and stops it: the tier with StaleIfError
// serves what it holds (read from Redis, or stored by itself, also a Put
// Redis refused) for as long as Redis is away, within each entry's TTL, and
// takes Redis's answer again, found or not, once it is back. The tier
// without it serves nothing past MaxAge.
func TestHotStaleIfErrorStandsInForRedis(t *testing.T) {
	srv := redistest.Start(t)
	c := redis.NewClient(&redis.Options{Addr: srv.Addr, ContextTimeoutEnabled: true, MaxRetries: -1,
		DialTimeout: 200 * time.Millisecond, ReadTimeout: 200 * time.Millisecond, WriteTimeout: 200 * time.Millisecond})
	t.Cleanup(func() { c.Close() })
	clock := &fakeClock{t: time.Date(2030, 5, 6, 7, 8, 9, 0, time.UTC)}
	tier := func(stale bool) *cache.Hot {
		rs, err := redisstore.New(c, redisstore.Options{Prefix: "stale", Timeout: 200 * time.Millisecond, Cooldown: -1, Now: clock.Now})
		require.NoError(t, err)
		h := cache.NewHot(rs, cache.HotOptions{MaxAge: 2 * time.Second, StaleIfError: stale, Now: clock.Now})
		t.Cleanup(func() { _ = h.Close() })
		return h
	}
	a, b, strict := tier(false), tier(true), tier(false)
	ctx := t.Context()
	read, short, refused, unseen := hotKey(1), hotKey(2), hotKey(3), hotKey(4)

	require.NoError(t, a.Put(ctx, read, []byte("one"), time.Hour))
	for _, h := range []*cache.Hot{b, strict} {
		v, found, err := h.Get(ctx, read)
		require.NoError(t, err)
		require.True(t, found)
		require.Equal(t, "one", string(v))
	}
	require.NoError(t, b.Put(ctx, short, []byte("two"), 10*time.Minute))
	require.NoError(t, a.Put(ctx, unseen, []byte("four"), time.Hour))
	clock.Advance(2*time.Second + time.Millisecond) // past MaxAge

	srv.Stop()
	for round := range 3 {
		v, found, stale, err := b.GetStale(ctx, read)
		assert.Equal(t, "one", string(v), "round %d", round)
		assert.True(t, found && stale, "round %d: found %v stale %v", round, found, stale)
		assert.ErrorIs(t, err, redisstore.ErrUnavailable, "round %d: GetStale says why", round)
		v, found, err = b.Get(ctx, short)
		assert.NoError(t, err, "round %d: Get serves the copy as the store's", round)
		assert.True(t, found)
		assert.Equal(t, "two", string(v))
		clock.Advance(time.Minute)
	}
	assert.Error(t, b.Put(ctx, refused, []byte("three"), time.Hour), "the Put fails")
	v, found, stale, _ := b.GetStale(ctx, refused)
	assert.True(t, found && stale, "a value Redis refused is served while Redis is away")
	assert.Equal(t, "three", string(v))

	_, found, err := b.Get(ctx, unseen)
	assert.Error(t, err)
	assert.False(t, found, "an entry this tier never saw")
	_, found, err = strict.Get(ctx, read)
	assert.Error(t, err)
	assert.False(t, found, "without StaleIfError nothing is served past MaxAge")

	clock.Advance(8 * time.Minute) // short's 10-minute TTL is over
	_, found, _ = b.Get(ctx, short)
	assert.False(t, found, "a copy is served no longer than its TTL")
	assert.EqualValues(t, 7, b.Stats().StaleHits, "three rounds of two, and the refused Put")

	// Redis comes back empty (the test server keeps nothing): its answers
	// win over the copies, found or not.
	srv.Restart(t)
	require.NoError(t, a.Put(ctx, read, []byte("one, refreshed"), time.Hour))
	v, found, err = b.Get(ctx, read)
	require.NoError(t, err)
	assert.True(t, found)
	assert.Equal(t, "one, refreshed", string(v))
	_, found, err = b.Get(ctx, refused)
	require.NoError(t, err)
	assert.False(t, found, "Redis lacks it, so the copy goes")

	srv.Stop()
	clock.Advance(2*time.Second + time.Millisecond)
	v, _, stale, _ = b.GetStale(ctx, read)
	assert.True(t, stale)
	assert.Equal(t, "one, refreshed", string(v), "the copy is Redis's latest answer")
	_, found, _, _ = b.GetStale(ctx, refused)
	assert.False(t, found, "a dropped copy is not served in the next outage")
}
