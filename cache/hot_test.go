package cache_test

import (
	"bytes"
	"context"
	"fmt"
	"math/rand/v2"
	"path/filepath"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/storetest"
)

func newBolt(tb testing.TB, opts boltstore.Options) *boltstore.Store {
	tb.Helper()
	if opts.SweepInterval == 0 {
		opts.SweepInterval = -1
	}
	s, err := boltstore.Open(filepath.Join(tb.TempDir(), "cache.db"), opts)
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { _ = s.Close() })
	return s
}

// plainStore hides the backing store's GetWithExpiry, so Hot falls back to
// FillTTL.
type plainStore struct{ cache.Store }

// watchedStore wraps a real store, counting Gets and, when pause is set,
// stopping each Get after it has read the store until release is closed.
type watchedStore struct {
	cache.Store
	gets    atomic.Int64
	pause   atomic.Bool
	paused  chan struct{}
	release chan struct{}
}

func (w *watchedStore) Get(ctx context.Context, key string) ([]byte, bool, error) {
	w.gets.Add(1)
	v, found, err := w.Store.Get(ctx, key)
	if w.pause.Load() {
		w.paused <- struct{}{}
		<-w.release
	}
	return v, found, err
}

func TestHotConformance(t *testing.T) {
	t.Run("over boltstore", func(t *testing.T) {
		storetest.Run(t, func(t *testing.T) cache.Store {
			return cache.NewHot(newBolt(t, boltstore.Options{}), cache.HotOptions{})
		})
	})
	t.Run("over a store without expiry times", func(t *testing.T) {
		storetest.Run(t, func(t *testing.T) cache.Store {
			return cache.NewHot(plainStore{newBolt(t, boltstore.Options{})}, cache.HotOptions{FillTTL: 20 * time.Millisecond})
		})
	})
	t.Run("tier off", func(t *testing.T) {
		storetest.Run(t, func(t *testing.T) cache.Store {
			return cache.NewHot(newBolt(t, boltstore.Options{}), cache.HotOptions{MaxBytes: -1})
		})
	})
	t.Run("stale if error", func(t *testing.T) {
		storetest.Run(t, func(t *testing.T) cache.Store {
			return cache.NewHot(newBolt(t, boltstore.Options{}), cache.HotOptions{MaxAge: 20 * time.Millisecond, StaleIfError: true})
		})
	})
	t.Run("tiny tier", func(t *testing.T) {
		storetest.Run(t, func(t *testing.T) cache.Store {
			return cache.NewHot(newBolt(t, boltstore.Options{}), cache.HotOptions{MaxBytes: 4 << 10})
		})
	})
}

func hotKey(i int) string { return cache.Key(cache.KeyParts{Namespace: "hot"}, []byte(fmt.Sprint(i))) }

func TestHotAnswersFromMemory(t *testing.T) {
	w := &watchedStore{Store: newBolt(t, boltstore.Options{})}
	h := cache.NewHot(w, cache.HotOptions{})
	ctx := t.Context()
	require.NoError(t, w.Store.Put(ctx, hotKey(1), []byte("from the store"), 0))
	for range 5 {
		v, found, err := h.Get(ctx, hotKey(1))
		require.NoError(t, err, "Get")
		require.True(t, found, "Get")
		require.Equal(t, "from the store", string(v), "Get")
	}
	assert.EqualValues(t, 1, w.gets.Load(), "backing Gets for 5 hot Gets: the fill")
	// A Put is answered from memory without a store read.
	require.NoError(t, h.Put(ctx, hotKey(2), []byte("put"), 0))
	v, _, _ := h.Get(ctx, hotKey(2))
	assert.Equal(t, "put", string(v), "Get after Put")
	assert.EqualValues(t, 1, w.gets.Load(), "backing Gets, still the fill's")
	// Misses are not remembered: a value that appears in the store later is found.
	_, found, _ := h.Get(ctx, hotKey(3))
	require.False(t, found, "found a key never stored")
	require.NoError(t, w.Store.Put(ctx, hotKey(3), []byte("late"), 0))
	v, found, _ = h.Get(ctx, hotKey(3))
	assert.True(t, found, "Get after the store gained the key")
	assert.Equal(t, "late", string(v), "Get after the store gained the key")
	st := h.Stats()
	assert.EqualValues(t, 5, st.Hits, "Stats: hits")
	assert.EqualValues(t, 3, st.Misses, "Stats: misses")
	assert.EqualValues(t, 3, st.Entries, "Stats: entries")
}

type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *fakeClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *fakeClock) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
}

func TestHotTTL(t *testing.T) {
	clock := &fakeClock{t: time.Date(2030, 5, 6, 7, 8, 9, 0, time.UTC)}
	w := &watchedStore{Store: newBolt(t, boltstore.Options{Now: clock.Now})}
	h := cache.NewHot(w, cache.HotOptions{Now: clock.Now})
	ctx := t.Context()
	require.NoError(t, h.Put(ctx, hotKey(1), []byte("a"), time.Minute))
	// Filled from the store: the memory copy keeps the store's expiry.
	require.NoError(t, w.Store.Put(ctx, hotKey(2), []byte("b"), 2*time.Minute))
	require.NoError(t, h.Put(ctx, hotKey(3), []byte("c"), 0))
	_, found, _ := h.Get(ctx, hotKey(2))
	require.True(t, found, "fill of key 2")
	clock.Advance(61 * time.Second)
	gets := w.gets.Load()
	_, found, err := h.Get(ctx, hotKey(1))
	assert.NoError(t, err, "Get of an entry past its TTL")
	assert.False(t, found, "Get of an entry past its TTL: want a miss")
	assert.Equal(t, gets+1, w.gets.Load(), "an expired memory entry is checked against the store")
	v, found, _ := h.Get(ctx, hotKey(2))
	assert.True(t, found, "Get of key 2 at +61s")
	assert.Equal(t, "b", string(v), "Get of key 2 at +61s")
	clock.Advance(time.Minute)
	gets = w.gets.Load()
	_, found, _ = h.Get(ctx, hotKey(2))
	assert.False(t, found, "filled entry outlived the store's expiry")
	assert.Equal(t, gets+1, w.gets.Load(), "filled entry was still answered from memory after its store expiry")
	clock.Advance(1000 * time.Hour)
	v, found, _ = h.Get(ctx, hotKey(3))
	assert.True(t, found, "entry without TTL after 1000h")
	assert.Equal(t, "c", string(v), "entry without TTL after 1000h")
}

// TestHotFillPastExpiry: a fill that reads an entry whose expiry has
// passed by the tier's clock, though not yet by the store's (Redis expires
// a key from when it received the write, after the writer's clock stamped
// the record), must not stay in memory: otter keeps an entry forever when
// its expiry works out non-positive.
func TestHotFillPastExpiry(t *testing.T) {
	storeClock := &fakeClock{t: time.Date(2030, 5, 6, 7, 8, 9, 0, time.UTC)}
	hotClock := &fakeClock{t: storeClock.Now().Add(20 * time.Second)}
	store := newBolt(t, boltstore.Options{Now: storeClock.Now}) // an ExpiryGetter, so fills keep its expiry
	h := cache.NewHot(store, cache.HotOptions{Now: hotClock.Now})
	ctx := t.Context()
	require.NoError(t, store.Put(ctx, hotKey(1), []byte("late"), 10*time.Second))
	_, found, _ := h.Get(ctx, hotKey(1))
	require.True(t, found, "the store still holds the entry by its own clock, so the fill should find it")
	storeClock.Advance(time.Minute)
	hotClock.Advance(time.Second)
	_, found, _ = h.Get(ctx, hotKey(1))
	assert.False(t, found, "an entry filled past its expiry was answered from memory after the store dropped it")
}

func TestHotFillTTLWithoutExpiryGetter(t *testing.T) {
	clock := &fakeClock{t: time.Date(2030, 5, 6, 7, 8, 9, 0, time.UTC)}
	w := &watchedStore{Store: newBolt(t, boltstore.Options{Now: clock.Now})}
	h := cache.NewHot(plainStore{w}, cache.HotOptions{Now: clock.Now, FillTTL: 10 * time.Second})
	ctx := t.Context()
	require.NoError(t, w.Store.Put(ctx, hotKey(1), []byte("v"), 0))
	for range 3 {
		_, found, _ := h.Get(ctx, hotKey(1))
		require.True(t, found, "Get")
	}
	require.EqualValues(t, 1, w.gets.Load(), "backing Gets")
	clock.Advance(11 * time.Second)
	_, found, _ := h.Get(ctx, hotKey(1))
	require.True(t, found, "Get after FillTTL")
	assert.EqualValues(t, 2, w.gets.Load(), "backing Gets after FillTTL: a refill")
}

// TestHotFillDoesNotResurrect: a Get that read the store before a Delete
// does not put the deleted value into memory afterwards.
func TestHotFillDoesNotResurrect(t *testing.T) {
	w := &watchedStore{Store: newBolt(t, boltstore.Options{}), paused: make(chan struct{}), release: make(chan struct{})}
	h := cache.NewHot(plainStore{w}, cache.HotOptions{})
	ctx := t.Context()
	require.NoError(t, w.Store.Put(ctx, hotKey(1), []byte("old"), 0))
	w.pause.Store(true)
	done := make(chan []byte)
	go func() {
		v, _, _ := h.Get(ctx, hotKey(1))
		done <- v
	}()
	<-w.paused // the Get has read "old" from the store
	w.pause.Store(false)
	require.NoError(t, h.Delete(ctx, hotKey(1)))
	close(w.release)
	assert.Equal(t, "old", string(<-done), "the racing Get (it read before the Delete)")
	v, found, _ := h.Get(ctx, hotKey(1))
	assert.False(t, found, "Get after Delete = %q; the fill resurrected a deleted entry", v)
}

func TestHotBoundedBytes(t *testing.T) {
	const maxBytes = 64 << 10
	h := cache.NewHot(newBolt(t, boltstore.Options{}), cache.HotOptions{MaxBytes: maxBytes})
	ctx := t.Context()
	value := bytes.Repeat([]byte("x"), 1000)
	for i := range 300 {
		require.NoError(t, h.Put(ctx, hotKey(i), value, 0))
	}
	// Eviction runs in otter's maintenance; force it before measuring.
	for i := range 300 {
		v, found, err := h.Get(ctx, hotKey(i))
		require.NoError(t, err, "Get(%d)", i)
		require.True(t, found && bytes.Equal(v, value), "Get(%d): the store must still have it", i)
	}
	st := h.Stats()
	assert.LessOrEqual(t, st.Bytes, uint64(maxBytes), "memory held, against its bound")
	assert.NotZero(t, st.Evictions, "evictions after 300 kB of Puts into a 64 kB tier: %+v", st)
}

func TestHotLargeValuesSkipMemory(t *testing.T) {
	w := &watchedStore{Store: newBolt(t, boltstore.Options{})}
	h := cache.NewHot(w, cache.HotOptions{MaxBytes: 1 << 20, MaxEntryBytes: 1000})
	ctx := t.Context()
	big := bytes.Repeat([]byte("y"), 1001)
	require.NoError(t, h.Put(ctx, hotKey(1), []byte("small"), 0))
	require.NoError(t, h.Put(ctx, hotKey(1), big, 0)) // replaces the small one in memory too
	for range 2 {
		v, found, _ := h.Get(ctx, hotKey(1))
		require.True(t, found && bytes.Equal(v, big), "Get = %d bytes, %v; want the big value", len(v), found)
	}
	assert.EqualValues(t, 2, w.gets.Load(), "backing Gets: values over MaxEntryBytes stay out of memory")
}

func TestHotFailedPutLeavesMemory(t *testing.T) {
	h := cache.NewHot(newBolt(t, boltstore.Options{MaxBytes: 2000}), cache.HotOptions{})
	ctx := t.Context()
	require.NoError(t, h.Put(ctx, hotKey(1), []byte("kept"), 0))
	noise := make([]byte, 5000) // random, so it does not compress below the cap
	r := rand.New(rand.NewPCG(1, 2))
	for i := range noise {
		noise[i] = byte(r.Uint32())
	}
	err := h.Put(ctx, hotKey(1), noise, 0)
	require.ErrorIs(t, err, cache.ErrTooLarge, "Put over the store's cap")
	v, _, _ := h.Get(ctx, hotKey(1))
	assert.Equal(t, "kept", string(v), "Get after a failed Put")
}

func TestHotCloseClosesBacking(t *testing.T) {
	b := newBolt(t, boltstore.Options{})
	h := cache.NewHot(b, cache.HotOptions{})
	require.NoError(t, h.Close())
	_, _, err := b.Get(t.Context(), hotKey(1))
	assert.ErrorIs(t, err, cache.ErrClosed, "backing Get after Hot.Close")
	assert.NoError(t, h.Close(), "second Close")
}

// TestHotMaxAge runs two tiers on one backing store, as two replicas on one
// Redis: after replica a replaces an answer, replica b serves its older copy
// no longer than MaxAge, whether b filled it from the store or stored it
// itself without a TTL.
func TestHotMaxAge(t *testing.T) {
	clock := &fakeClock{t: time.Date(2030, 5, 6, 7, 8, 9, 0, time.UTC)}
	shared := newBolt(t, boltstore.Options{Now: clock.Now})
	a := cache.NewHot(shared, cache.HotOptions{Now: clock.Now, MaxAge: 2 * time.Second})
	b := cache.NewHot(shared, cache.HotOptions{Now: clock.Now, MaxAge: 2 * time.Second})
	ctx := t.Context()
	tests := []struct {
		name  string
		setup func(k string)
	}{
		{"filled by b", func(k string) {
			require.NoError(t, a.Put(ctx, k, []byte("old"), time.Hour))
			v, _, _ := b.Get(ctx, k)
			require.Equal(t, "old", string(v), "b's first read")
		}},
		{"stored by b without a TTL", func(k string) {
			require.NoError(t, b.Put(ctx, k, []byte("old"), 0))
		}},
	}
	for i, tc := range tests {
		k := hotKey(100 + i)
		tc.setup(k)
		require.NoError(t, a.Put(ctx, k, []byte("new"), time.Hour)) // a refresh on a
		v, _, _ := b.Get(ctx, k)
		assert.Equal(t, "old", string(v), "%s: b right after a's refresh: its memory copy (within MaxAge)", tc.name)
		clock.Advance(2*time.Second + time.Millisecond)
		v, _, _ = b.Get(ctx, k)
		assert.Equal(t, "new", string(v), "%s: b after MaxAge", tc.name)
	}
}
