package redisstore_test

import (
	"bytes"
	"context"
	"fmt"
	"strconv"
	"sync/atomic"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/cache/storetest"
	"github.com/stintlab/stint/internal/redistest"
)

// freshPrefix gives each store of a test its own key prefix on a shared
// server, so parallel subtests never see each other's keys.
var prefixCounter atomic.Int64

func freshPrefix() string { return "t" + strconv.FormatInt(prefixCounter.Add(1), 10) }

func newStore(tb testing.TB, c redis.UniversalClient, opts redisstore.Options) *redisstore.Store {
	tb.Helper()
	if opts.Prefix == "" {
		opts.Prefix = freshPrefix()
	}
	s, err := redisstore.New(c, opts)
	if err != nil {
		tb.Fatalf("redisstore.New: %v", err)
	}
	tb.Cleanup(func() { _ = s.Close() })
	return s
}

func TestConformanceStandalone(t *testing.T) {
	c := redistest.Start(t).Client(t)
	storetest.Run(t, func(t *testing.T) cache.Store { return newStore(t, c, redisstore.Options{}) })
}

// TestConformanceCluster runs the suite on a real three-master cluster, so
// that keys land on different nodes.
func TestConformanceCluster(t *testing.T) {
	c := redistest.StartCluster(t, 3).Client(t)
	storetest.Run(t, func(t *testing.T) cache.Store { return newStore(t, c, redisstore.Options{}) })
}

// TestConformanceWithHot runs the suite on the hot tier in front of the
// Redis store, with the memory age bound a shared store is used with.
func TestConformanceWithHot(t *testing.T) {
	c := redistest.Start(t).Client(t)
	storetest.Run(t, func(t *testing.T) cache.Store {
		return cache.NewHot(newStore(t, c, redisstore.Options{}), cache.HotOptions{MaxBytes: 8 << 20, MaxAge: time.Second})
	})
}

func key(i int) string { return fmt.Sprintf("%064x", i) }

// TestKeysShareASlot checks the key layout on a cluster: the entry and its
// lease live in the slot of the entry key's hash tag, and the entry has the
// TTL Put gave it.
func TestKeysShareASlot(t *testing.T) {
	c := redistest.StartCluster(t, 3).Client(t)
	s := newStore(t, c, redisstore.Options{Prefix: "slots"})
	ctx := t.Context()
	k := key(42)
	require.NoError(t, s.Put(ctx, k, []byte("answer"), time.Hour))
	release, err := s.Claim(ctx, k)
	require.NoError(t, err, "Claim of a free key")
	require.NotNil(t, release, "Claim of a free key: held")
	defer release(ctx)
	vk, lk := "slots:cache:{"+k+"}:v", "slots:cache:{"+k+"}:l"
	vs, err1 := c.ClusterKeySlot(ctx, vk).Result()
	ls, err2 := c.ClusterKeySlot(ctx, lk).Result()
	require.NoError(t, err1)
	require.NoError(t, err2)
	assert.Equal(t, vs, ls, "slots of %s and %s: want one slot", vk, lk)
	ttl, err := c.PTTL(ctx, vk).Result()
	require.NoError(t, err, "PTTL of the entry")
	assert.Greater(t, ttl, 59*time.Minute, "PTTL of the entry: about an hour")
	assert.LessOrEqual(t, ttl, time.Hour, "PTTL of the entry: about an hour")
	n, err := c.Exists(ctx, lk).Result()
	require.NoError(t, err)
	assert.EqualValues(t, 1, n, "lease key %s exists", lk)
}

// TestValuesAreCompressed checks that a large repetitive value is stored
// compressed and a small one as it is.
func TestValuesAreCompressed(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{Prefix: "packed"})
	ctx := t.Context()
	big := bytes.Repeat([]byte(`{"text":" the barge carries the hives upriver"},`), 200)
	tests := []struct {
		name      string
		value     []byte
		maxStored int
	}{
		{"repetitive 10 KB", big, len(big) / 4},
		{"small", []byte(`{"text":"ok"}`), len(`{"text":"ok"}`) + 14},
	}
	for i, tc := range tests {
		require.NoError(t, s.Put(ctx, key(i), tc.value, 0))
		n, err := c.StrLen(ctx, "packed:cache:{"+key(i)+"}:v").Result()
		require.NoError(t, err, "%s: STRLEN", tc.name)
		assert.LessOrEqual(t, int(n), tc.maxStored, "%s: bytes stored", tc.name)
	}
}

// TestCorruptValueIsAnError writes a foreign value under an entry's key: Get
// reports ErrCorrupt rather than returning it.
func TestCorruptValueIsAnError(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{Prefix: "bad"})
	ctx := t.Context()
	require.NoError(t, s.Put(ctx, key(1), []byte("a fine answer"), 0))
	raw, _ := c.Get(ctx, "bad:cache:{"+key(1)+"}:v").Bytes()
	tests := []struct {
		name  string
		value []byte
	}{
		{"not an entry", []byte("hello")},
		{"flipped byte", append(append([]byte{}, raw[:len(raw)-1]...), raw[len(raw)-1]^1)},
	}
	for _, tc := range tests {
		c.Set(ctx, "bad:cache:{"+key(1)+"}:v", tc.value, 0)
		_, _, err := s.Get(ctx, key(1))
		assert.ErrorIs(t, err, redisstore.ErrCorrupt, "%s: Get", tc.name)
	}
}

func TestTooLarge(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{MaxEntryBytes: 1000, CompressMin: -1})
	assert.ErrorIs(t, s.Put(t.Context(), key(1), make([]byte, 2000), 0), cache.ErrTooLarge, "Put of 2000 bytes with a 1000-byte limit")
}

func TestBadOptions(t *testing.T) {
	c := redis.NewClient(&redis.Options{Addr: "127.0.0.1:1"})
	defer c.Close()
	tests := []struct {
		name string
		opts redisstore.Options
		want string
	}{
		{"brace in prefix", redisstore.Options{Prefix: "a{b"}, "prefix"},
		{"tiny lease", redisstore.Options{LeaseTTL: time.Millisecond}, "LeaseTTL"},
	}
	for _, tc := range tests {
		_, err := redisstore.New(c, tc.opts)
		if assert.Error(t, err, "%s: New", tc.name) {
			assert.Contains(t, err.Error(), tc.want, "%s: New's error names the option", tc.name)
		}
	}
	_, err := redisstore.New(nil, redisstore.Options{})
	assert.Error(t, err, "New(nil client)")
}

// TestCloseLeavesClientOpen: the store does not own the client.
func TestCloseLeavesClientOpen(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{})
	require.NoError(t, s.Close())
	assert.NoError(t, c.Ping(t.Context()).Err(), "client after the store's Close: still open")
}

// TestDeadRedisFailsFastAndRecovers stops the server: calls fail with
// ErrUnavailable well before the caller's deadline, and once the server is
// back the same store works again.
func TestDeadRedisFailsFastAndRecovers(t *testing.T) {
	srv := redistest.Start(t)
	c := redis.NewClient(&redis.Options{Addr: srv.Addr, ContextTimeoutEnabled: true, MaxRetries: -1})
	defer c.Close()
	s := newStore(t, c, redisstore.Options{Timeout: 200 * time.Millisecond, Cooldown: 100 * time.Millisecond})
	ctx := t.Context()
	require.NoError(t, s.Put(ctx, key(1), []byte("kept"), 0))
	srv.Stop()
	dctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	ops := []struct {
		name string
		do   func() error
	}{
		{"Get", func() error { _, _, err := s.Get(dctx, key(1)); return err }},
		{"Put", func() error { return s.Put(dctx, key(2), []byte("x"), 0) }},
		{"Delete", func() error { return s.Delete(dctx, key(1)) }},
		{"Claim", func() error { _, err := s.Claim(dctx, key(3)); return err }},
	}
	for _, op := range ops {
		assert.ErrorIs(t, op.do(), redisstore.ErrUnavailable, "%s with Redis down", op.name)
		assert.NoError(t, dctx.Err(), "%s with Redis down: ErrUnavailable before the deadline", op.name)
	}
	srv.Restart(t)
	deadline := time.Now().Add(10 * time.Second)
	for {
		err := s.Put(ctx, key(1), []byte("back"), 0)
		if err == nil {
			break
		}
		require.False(t, time.Now().After(deadline), "Put after Redis came back: %v", err)
		time.Sleep(20 * time.Millisecond) // polling interval while the cooldown ends
	}
	v, found, err := s.Get(ctx, key(1))
	require.NoError(t, err, "Get after recovery")
	assert.True(t, found, "Get after recovery")
	assert.Equal(t, "back", string(v), "Get after recovery")
}

// TestSlowRedisIsBounded pauses the server (CLIENT PAUSE, as an overloaded
// or stalled Redis looks): a Get returns ErrUnavailable after the store's
// timeout, long before the caller's own deadline.
func TestSlowRedisIsBounded(t *testing.T) {
	srv := redistest.Start(t)
	c := redis.NewClient(&redis.Options{Addr: srv.Addr, ContextTimeoutEnabled: true, MaxRetries: -1})
	defer c.Close()
	s := newStore(t, c, redisstore.Options{Timeout: 100 * time.Millisecond})
	ctx := t.Context()
	require.NoError(t, s.Put(ctx, key(1), []byte("v"), 0))
	admin := srv.Client(t)
	require.NoError(t, admin.Do(ctx, "CLIENT", "PAUSE", 5000, "ALL").Err())
	defer admin.Do(context.Background(), "CLIENT", "UNPAUSE")
	dctx, cancel := context.WithTimeout(ctx, 4*time.Second)
	defer cancel()
	_, _, err := s.Get(dctx, key(1))
	assert.ErrorIs(t, err, redisstore.ErrUnavailable, "Get on a paused Redis")
	assert.NoError(t, dctx.Err(), "Get on a paused Redis: ErrUnavailable before the caller's deadline")
}
