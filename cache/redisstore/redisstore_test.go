package redisstore_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"strconv"
	"sync/atomic"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

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
	if err := s.Put(ctx, k, []byte("answer"), time.Hour); err != nil {
		t.Fatal(err)
	}
	release, err := s.Claim(ctx, k)
	if err != nil || release == nil {
		t.Fatalf("Claim of a free key: release %v, err %v", release != nil, err)
	}
	defer release(ctx)
	vk, lk := "slots:cache:{"+k+"}:v", "slots:cache:{"+k+"}:l"
	vs, err1 := c.ClusterKeySlot(ctx, vk).Result()
	ls, err2 := c.ClusterKeySlot(ctx, lk).Result()
	if err1 != nil || err2 != nil || vs != ls {
		t.Errorf("slots of %s and %s: %d, %d (%v %v), want one slot", vk, lk, vs, ls, err1, err2)
	}
	ttl, err := c.PTTL(ctx, vk).Result()
	if err != nil || ttl <= 59*time.Minute || ttl > time.Hour {
		t.Errorf("PTTL of the entry = %v, %v; want about an hour", ttl, err)
	}
	if n, err := c.Exists(ctx, lk).Result(); err != nil || n != 1 {
		t.Errorf("lease key %s exists = %d, %v", lk, n, err)
	}
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
		if err := s.Put(ctx, key(i), tc.value, 0); err != nil {
			t.Fatal(err)
		}
		n, err := c.StrLen(ctx, "packed:cache:{"+key(i)+"}:v").Result()
		if err != nil || int(n) > tc.maxStored {
			t.Errorf("%s: %d bytes stored (%v), want at most %d", tc.name, n, err, tc.maxStored)
		}
	}
}

// TestCorruptValueIsAnError writes a foreign value under an entry's key: Get
// reports ErrCorrupt rather than returning it.
func TestCorruptValueIsAnError(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{Prefix: "bad"})
	ctx := t.Context()
	if err := s.Put(ctx, key(1), []byte("a fine answer"), 0); err != nil {
		t.Fatal(err)
	}
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
		if _, _, err := s.Get(ctx, key(1)); !errors.Is(err, redisstore.ErrCorrupt) {
			t.Errorf("%s: Get err = %v, want ErrCorrupt", tc.name, err)
		}
	}
}

func TestTooLarge(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{MaxEntryBytes: 1000, CompressMin: -1})
	if err := s.Put(t.Context(), key(1), make([]byte, 2000), 0); !errors.Is(err, cache.ErrTooLarge) {
		t.Errorf("Put of 2000 bytes with a 1000-byte limit: %v, want cache.ErrTooLarge", err)
	}
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
		if _, err := redisstore.New(c, tc.opts); err == nil || !bytes.Contains([]byte(err.Error()), []byte(tc.want)) {
			t.Errorf("%s: New err = %v, want one naming %s", tc.name, err, tc.want)
		}
	}
	if _, err := redisstore.New(nil, redisstore.Options{}); err == nil {
		t.Error("New(nil client) succeeded")
	}
}

// TestCloseLeavesClientOpen: the store does not own the client.
func TestCloseLeavesClientOpen(t *testing.T) {
	c := redistest.Start(t).Client(t)
	s := newStore(t, c, redisstore.Options{})
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := c.Ping(t.Context()).Err(); err != nil {
		t.Errorf("client after the store's Close: %v, want it still open", err)
	}
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
	if err := s.Put(ctx, key(1), []byte("kept"), 0); err != nil {
		t.Fatal(err)
	}
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
		if err := op.do(); !errors.Is(err, redisstore.ErrUnavailable) || dctx.Err() != nil {
			t.Errorf("%s with Redis down: %v (deadline passed: %v), want ErrUnavailable first", op.name, err, dctx.Err())
		}
	}
	srv.Restart(t)
	deadline := time.Now().Add(10 * time.Second)
	for {
		err := s.Put(ctx, key(1), []byte("back"), 0)
		if err == nil {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("Put after Redis came back: %v", err)
		}
		time.Sleep(20 * time.Millisecond) // polling interval while the cooldown ends
	}
	v, found, err := s.Get(ctx, key(1))
	if err != nil || !found || string(v) != "back" {
		t.Errorf("Get after recovery = %q, %v, %v", v, found, err)
	}
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
	if err := s.Put(ctx, key(1), []byte("v"), 0); err != nil {
		t.Fatal(err)
	}
	admin := srv.Client(t)
	if err := admin.Do(ctx, "CLIENT", "PAUSE", 5000, "ALL").Err(); err != nil {
		t.Fatal(err)
	}
	defer admin.Do(context.Background(), "CLIENT", "UNPAUSE")
	dctx, cancel := context.WithTimeout(ctx, 4*time.Second)
	defer cancel()
	if _, _, err := s.Get(dctx, key(1)); !errors.Is(err, redisstore.ErrUnavailable) || dctx.Err() != nil {
		t.Errorf("Get on a paused Redis: %v (caller deadline passed: %v), want ErrUnavailable before the deadline", err, dctx.Err())
	}
}
