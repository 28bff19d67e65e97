package boltstore_test

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/storetest"
)

func TestConformance(t *testing.T) {
	storetest.Run(t, func(t *testing.T) cache.Store {
		return openStore(t, filepath.Join(t.TempDir(), "cache.db"), boltstore.Options{SweepInterval: -1})
	})
}

func TestConformanceSharedDB(t *testing.T) {
	storetest.Run(t, func(t *testing.T) cache.Store {
		db := openBolt(t, filepath.Join(t.TempDir(), "shared.db"))
		s, err := boltstore.New(db, boltstore.Options{CompressMin: -1})
		require.NoError(t, err)
		return s
	})
}

func openStore(tb testing.TB, path string, opts boltstore.Options) *boltstore.Store {
	tb.Helper()
	s, err := boltstore.Open(path, opts)
	if err != nil {
		tb.Fatalf("Open: %v", err)
	}
	tb.Cleanup(func() { _ = s.Close() })
	return s
}

func openBolt(tb testing.TB, path string) *bbolt.DB {
	tb.Helper()
	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: time.Second})
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { _ = db.Close() })
	return db
}

// fakeClock is a settable clock for Options.Now.
type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func newFakeClock() *fakeClock { return &fakeClock{t: time.Date(2030, 1, 2, 3, 4, 5, 0, time.UTC)} }

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

func k(i int) string { return fmt.Sprintf("%064x", i) }

func checkStore(tb testing.TB, s *boltstore.Store) {
	tb.Helper()
	if err := s.Check(context.Background()); err != nil {
		tb.Fatalf("Check: %v", err)
	}
}

func TestSurvivesReopen(t *testing.T) {
	path := filepath.Join(t.TempDir(), "cache.db")
	s, err := boltstore.Open(path, boltstore.Options{SweepInterval: -1})
	require.NoError(t, err)
	ctx := t.Context()
	want := map[string][]byte{}
	for i := range 50 {
		v := bytes.Repeat([]byte(fmt.Sprintf(`{"n":%d}`, i)), i*10)
		want[k(i)] = v
		require.NoError(t, s.Put(ctx, k(i), v, time.Hour))
	}
	require.NoError(t, s.Delete(ctx, k(7)))
	delete(want, k(7))
	require.NoError(t, s.Close())
	s = openStore(t, path, boltstore.Options{SweepInterval: -1})
	for key, v := range want {
		got, found, err := s.Get(ctx, key)
		assert.NoError(t, err, "after reopen Get(%s)", key[56:])
		assert.True(t, found && bytes.Equal(got, v), "after reopen Get(%s) = found %v, equal %v", key[56:], found, bytes.Equal(got, v))
	}
	_, found, _ := s.Get(ctx, k(7))
	assert.False(t, found, "deleted entry is back after reopen")
	st, err := s.Stats(ctx)
	require.NoError(t, err, "Stats")
	assert.Equal(t, int64(len(want)), st.Entries, "Stats: entries")
	checkStore(t, s)
}

func TestExpiryWithFakeClock(t *testing.T) {
	clock := newFakeClock()
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1, Now: clock.Now})
	ctx := t.Context()
	for i := range 10 {
		ttl := time.Duration(i+1) * time.Minute // entry i expires after i+1 minutes
		require.NoError(t, s.Put(ctx, k(i), []byte("v"), ttl))
	}
	require.NoError(t, s.Put(ctx, k(100), []byte("forever"), 0))
	v, exp, found, err := s.GetWithExpiry(ctx, k(2))
	require.NoError(t, err, "GetWithExpiry")
	require.True(t, found, "GetWithExpiry")
	require.Equal(t, "v", string(v), "GetWithExpiry")
	require.WithinDuration(t, clock.Now().Add(3*time.Minute), exp, 0, "GetWithExpiry: the expiry")
	_, exp, _, _ = s.GetWithExpiry(ctx, k(100))
	assert.True(t, exp.IsZero(), "expiry of an entry without TTL = %v, want zero", exp)

	clock.Advance(3*time.Minute + time.Second) // entries 0, 1, 2 expired
	for i := range 10 {
		_, found, err := s.Get(ctx, k(i))
		assert.NoError(t, err, "Get(entry %d) at +3m1s", i)
		assert.Equal(t, i >= 3, found, "Get(entry %d) at +3m1s: found", i)
	}
	// Expired entries are invisible but still stored until swept.
	st, _ := s.Stats(ctx)
	assert.EqualValues(t, 11, st.Entries, "Entries before sweep")
	n, err := s.Sweep(ctx)
	assert.NoError(t, err, "Sweep")
	assert.EqualValues(t, 3, n, "Sweep: removed")
	st, _ = s.Stats(ctx)
	assert.EqualValues(t, 8, st.Entries, "Entries after sweep")
	clock.Advance(time.Hour)
	n, err = s.Sweep(ctx)
	assert.NoError(t, err, "second Sweep")
	assert.EqualValues(t, 7, n, "second Sweep: removed")
	_, found, _ = s.Get(ctx, k(100))
	assert.True(t, found, "entry without TTL was swept")
	checkStore(t, s)
}

// TestSweepManyBatches removes more than one sweep transaction's worth.
func TestSweepManyBatches(t *testing.T) {
	clock := newFakeClock()
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1, Now: clock.Now})
	ctx := t.Context()
	// One transaction for the setup: write through the shared handle is not
	// possible for entries, so Put them, but keep the count modest.
	const n = 1200
	for i := range n {
		require.NoError(t, s.Put(ctx, k(i), []byte("x"), time.Minute))
	}
	clock.Advance(2 * time.Minute)
	got, err := s.Sweep(ctx)
	require.NoError(t, err, "Sweep")
	require.EqualValues(t, n, got, "Sweep: removed")
	st, _ := s.Stats(ctx)
	assert.Zero(t, st.Entries, "Stats after sweeping everything: entries")
	assert.Zero(t, st.Bytes, "Stats after sweeping everything: bytes")
	checkStore(t, s)
}

// TestBackgroundSweeper lets the sweeper goroutine, not the test, remove
// expired entries, observed by polling Stats.
func TestBackgroundSweeper(t *testing.T) {
	clock := newFakeClock()
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: 5 * time.Millisecond, Now: clock.Now})
	ctx := t.Context()
	for i := range 5 {
		require.NoError(t, s.Put(ctx, k(i), []byte("v"), time.Second))
	}
	clock.Advance(time.Minute)
	deadline := time.Now().Add(10 * time.Second)
	for {
		st, err := s.Stats(ctx)
		require.NoError(t, err)
		if st.Entries == 0 {
			break
		}
		require.False(t, time.Now().After(deadline), "sweeper left %d expired entries after 10s", st.Entries)
		time.Sleep(5 * time.Millisecond) // polling interval
	}
	require.NoError(t, s.Close()) // stops the sweeper
}

func TestEvictionOldestFirst(t *testing.T) {
	clock := newFakeClock()
	const capBytes = 10_000
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1, Now: clock.Now, MaxBytes: capBytes, CompressMin: -1})
	ctx := t.Context()
	value := bytes.Repeat([]byte("v"), 1000-64-22) // 1000 stored bytes with key and header
	for i := range 10 {
		clock.Advance(time.Second)
		require.NoError(t, s.Put(ctx, k(i), value, 0))
	}
	st, _ := s.Stats(ctx)
	require.EqualValues(t, capBytes, st.Bytes, "Stats at the cap: bytes")
	require.EqualValues(t, 10, st.Entries, "Stats at the cap: entries")
	// Overwriting entry 0 makes it the newest; entry 1 is now the oldest.
	clock.Advance(time.Second)
	require.NoError(t, s.Put(ctx, k(0), value, 0))
	for i := 10; i < 13; i++ {
		clock.Advance(time.Second)
		require.NoError(t, s.Put(ctx, k(i), value, 0))
	}
	evicted := map[int]bool{1: true, 2: true, 3: true}
	for i := range 13 {
		_, found, err := s.Get(ctx, k(i))
		assert.NoError(t, err, "entry %d", i)
		assert.Equal(t, !evicted[i], found, "entry %d: found", i)
	}
	st, _ = s.Stats(ctx)
	assert.LessOrEqual(t, st.Bytes, int64(capBytes), "Bytes, against the cap")
	// One bigger entry evicts as many old ones as it needs.
	clock.Advance(time.Second)
	require.NoError(t, s.Put(ctx, k(50), bytes.Repeat([]byte("w"), 3500), 0))
	for _, i := range []int{4, 5, 6, 7} {
		_, found, _ := s.Get(ctx, k(i))
		assert.False(t, found, "entry %d survived a 3.5 kB Put at the cap", i)
	}
	_, found, _ := s.Get(ctx, k(8))
	assert.True(t, found, "entry 8 evicted although the cap was met without it")
	err := s.Put(ctx, k(99), make([]byte, capBytes), 0)
	assert.ErrorIs(t, err, cache.ErrTooLarge, "Put of an entry over the cap")
	checkStore(t, s)
}

// TestCompression: compressible values take less room than their length;
// small ones and incompressible ones are stored as they are.
func TestCompression(t *testing.T) {
	ctx := t.Context()
	big := bytes.Repeat([]byte(`{"text":"the copper tide rose north of the orchard"},`), 200)
	tests := []struct {
		name        string
		opts        boltstore.Options
		value       []byte
		wantShrunk  bool
		wantAtMost  int
		wantAtLeast int
	}{
		{"compressible, S2 (default)", boltstore.Options{}, big, true, len(big) / 5, 0},
		{"compressible, zstd", boltstore.Options{Codec: boltstore.CodecZstd}, big, true, len(big) / 5, 0},
		{"compression off", boltstore.Options{CompressMin: -1}, big, false, 0, len(big)},
		{"below threshold", boltstore.Options{CompressMin: 1 << 20}, big, false, 0, len(big)},
		{"tiny", boltstore.Options{}, []byte(`{"a":1}`), false, 0, 7},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tc.opts.SweepInterval = -1
			s := openStore(t, filepath.Join(t.TempDir(), "c.db"), tc.opts)
			require.NoError(t, s.Put(ctx, k(1), tc.value, 0))
			st, _ := s.Stats(ctx)
			stored := int(st.Bytes) - 64 - 22
			if tc.wantShrunk {
				assert.LessOrEqual(t, stored, tc.wantAtMost, "bytes stored for a %d-byte value", len(tc.value))
			} else {
				assert.Equal(t, len(tc.value), stored, "bytes stored for a %d-byte value: stored as is", len(tc.value))
			}
			got, found, err := s.Get(ctx, k(1))
			require.NoError(t, err, "Get")
			assert.True(t, found && bytes.Equal(got, tc.value), "Get = found %v, equal %v", found, bytes.Equal(got, tc.value))
		})
	}
}

// TestCodecsReadEachOther: a file written with one codec reads back whole
// when reopened with the other, so changing Codec never strands entries.
func TestCodecsReadEachOther(t *testing.T) {
	ctx := t.Context()
	tests := []struct {
		name          string
		write, reopen boltstore.Codec
	}{
		{"zstd then S2", boltstore.CodecZstd, boltstore.CodecS2},
		{"S2 then zstd", boltstore.CodecS2, boltstore.CodecZstd},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "c.db")
			values := map[string][]byte{}
			for i := range 20 {
				values[k(i)] = bytes.Repeat(fmt.Appendf(nil, `{"choice":%d,"text":"the reading corner's lantern"},`, i), 10+i*7)
			}
			s, err := boltstore.Open(path, boltstore.Options{SweepInterval: -1, Codec: tc.write})
			require.NoError(t, err)
			for key, v := range values {
				require.NoError(t, s.Put(ctx, key, v, 0))
			}
			require.NoError(t, s.Close())
			r := openStore(t, path, boltstore.Options{SweepInterval: -1, Codec: tc.reopen})
			for key, v := range values {
				got, found, err := r.Get(ctx, key)
				assert.NoError(t, err, "%s", key)
				assert.True(t, found && bytes.Equal(got, v), "%s: found %v, equal %v", key, found, bytes.Equal(got, v))
			}
			checkStore(t, r)
		})
	}
}

// TestSharedFile: the cache shares one file with another component's
// buckets, touches only its own, and does not close the shared handle.
func TestSharedFile(t *testing.T) {
	path := filepath.Join(t.TempDir(), "stint.db")
	owner := openStore(t, path, boltstore.Options{SweepInterval: -1})
	db := owner.DB()
	err := db.Update(func(tx *bbolt.Tx) error {
		b, err := tx.CreateBucketIfNotExists([]byte("budget.v1"))
		if err != nil {
			return err
		}
		return b.Put([]byte("team-heron"), []byte("12.50"))
	})
	require.NoError(t, err)
	second, err := boltstore.New(db, boltstore.Options{SweepInterval: -1})
	require.NoError(t, err)
	require.NoError(t, second.Put(t.Context(), k(1), []byte("v"), 0))
	require.NoError(t, second.Close())
	// The shared handle is still open, and both components' data are there.
	err = db.View(func(tx *bbolt.Tx) error {
		if got := tx.Bucket([]byte("budget.v1")).Get([]byte("team-heron")); string(got) != "12.50" {
			return fmt.Errorf("budget bucket value = %q, want 12.50", got)
		}
		var names []string
		_ = tx.ForEach(func(name []byte, _ *bbolt.Bucket) error {
			names = append(names, string(name))
			return nil
		})
		if strings.Join(names, ",") != "budget.v1,stint.cache.v1" {
			return fmt.Errorf("top-level buckets = %v, want budget.v1 and stint.cache.v1 only", names)
		}
		return nil
	})
	require.NoError(t, err, "after closing the New store")
	_, found, err := owner.Get(t.Context(), k(1))
	assert.NoError(t, err, "owner Get")
	assert.True(t, found, "owner Get")
	_, err = boltstore.New(nil, boltstore.Options{})
	assert.Error(t, err, "New(nil)")
}

func TestCorruptFile(t *testing.T) {
	dir := t.TempDir()
	garbage := make([]byte, 64<<10)
	for i := range garbage {
		garbage[i] = byte(i*7 + i>>8)
	}
	tests := []struct {
		name    string
		content []byte
	}{
		{"garbage", garbage},
		{"text", []byte("these are not the bytes of a database\n")},
		{"zeros", make([]byte, 32<<10)},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(dir, tc.name+".db")
			require.NoError(t, os.WriteFile(path, tc.content, 0o600))
			s, err := boltstore.Open(path, boltstore.Options{LockTimeout: -1})
			if err == nil {
				_ = s.Close()
			}
			require.ErrorIs(t, err, boltstore.ErrCorrupt, "Open of a corrupt file")
			assert.Contains(t, err.Error(), path, "Open's error names the file")
		})
	}
}

// TestDamagedEntry flips a byte of a stored value behind the store's back:
// Get reports ErrCorrupt rather than a wrong answer, and Check finds it.
func TestDamagedEntry(t *testing.T) {
	for _, opts := range []boltstore.Options{{CompressMin: -1}, {}, {Codec: boltstore.CodecZstd}} {
		t.Run(fmt.Sprintf("CompressMin=%d/Codec=%d", opts.CompressMin, opts.Codec), func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "c.db")
			opts.SweepInterval = -1
			s := openStore(t, path, opts)
			value := bytes.Repeat([]byte(`{"answer":"forty-two"}`), 40)
			require.NoError(t, s.Put(t.Context(), k(1), value, 0))
			err := s.DB().Update(func(tx *bbolt.Tx) error {
				b := tx.Bucket([]byte("stint.cache.v1")).Bucket([]byte("entries"))
				rec := bytes.Clone(b.Get([]byte(k(1))))
				rec[len(rec)-3] ^= 0x40
				return b.Put([]byte(k(1)), rec)
			})
			require.NoError(t, err)
			got, _, err := s.Get(t.Context(), k(1))
			assert.ErrorIs(t, err, boltstore.ErrCorrupt, "Get of a damaged entry = %.20q", got)
			assert.ErrorIs(t, s.Check(t.Context()), boltstore.ErrCorrupt, "Check =")
			// Overwriting repairs it.
			require.NoError(t, s.Put(t.Context(), k(1), value, 0))
			checkStore(t, s)
		})
	}
}

func TestPutRejectsBadKeys(t *testing.T) {
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1})
	for _, key := range []string{"", strings.Repeat("k", bbolt.MaxKeySize)} {
		assert.Error(t, s.Put(t.Context(), key, []byte("v"), 0), "Put with a %d-byte key", len(key))
	}
}
