package boltstore_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

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
		if err != nil {
			t.Fatal(err)
		}
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
	if err != nil {
		t.Fatal(err)
	}
	ctx := t.Context()
	want := map[string][]byte{}
	for i := range 50 {
		v := bytes.Repeat([]byte(fmt.Sprintf(`{"n":%d}`, i)), i*10)
		want[k(i)] = v
		if err := s.Put(ctx, k(i), v, time.Hour); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Delete(ctx, k(7)); err != nil {
		t.Fatal(err)
	}
	delete(want, k(7))
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s = openStore(t, path, boltstore.Options{SweepInterval: -1})
	for key, v := range want {
		got, found, err := s.Get(ctx, key)
		if err != nil || !found || !bytes.Equal(got, v) {
			t.Errorf("after reopen Get(%s) = found %v, err %v, equal %v", key[56:], found, err, bytes.Equal(got, v))
		}
	}
	if _, found, _ := s.Get(ctx, k(7)); found {
		t.Error("deleted entry is back after reopen")
	}
	st, err := s.Stats(ctx)
	if err != nil || st.Entries != int64(len(want)) {
		t.Errorf("Stats = %+v, %v; want %d entries", st, err, len(want))
	}
	checkStore(t, s)
}

func TestExpiryWithFakeClock(t *testing.T) {
	clock := newFakeClock()
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1, Now: clock.Now})
	ctx := t.Context()
	for i := range 10 {
		ttl := time.Duration(i+1) * time.Minute // entry i expires after i+1 minutes
		if err := s.Put(ctx, k(i), []byte("v"), ttl); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Put(ctx, k(100), []byte("forever"), 0); err != nil {
		t.Fatal(err)
	}
	v, exp, found, err := s.GetWithExpiry(ctx, k(2))
	if err != nil || !found || string(v) != "v" || !exp.Equal(clock.Now().Add(3*time.Minute)) {
		t.Fatalf("GetWithExpiry = %q, %v, %v, %v; want expiry %v", v, exp, found, err, clock.Now().Add(3*time.Minute))
	}
	if _, exp, _, _ := s.GetWithExpiry(ctx, k(100)); !exp.IsZero() {
		t.Errorf("expiry of an entry without TTL = %v, want zero", exp)
	}

	clock.Advance(3*time.Minute + time.Second) // entries 0, 1, 2 expired
	for i := range 10 {
		_, found, err := s.Get(ctx, k(i))
		if err != nil || found != (i >= 3) {
			t.Errorf("Get(entry %d) at +3m1s = found %v, err %v; want found %v", i, found, err, i >= 3)
		}
	}
	// Expired entries are invisible but still stored until swept.
	if st, _ := s.Stats(ctx); st.Entries != 11 {
		t.Errorf("Entries before sweep = %d, want 11", st.Entries)
	}
	n, err := s.Sweep(ctx)
	if err != nil || n != 3 {
		t.Errorf("Sweep = %d, %v; want 3 removed", n, err)
	}
	if st, _ := s.Stats(ctx); st.Entries != 8 {
		t.Errorf("Entries after sweep = %d, want 8", st.Entries)
	}
	clock.Advance(time.Hour)
	if n, err := s.Sweep(ctx); err != nil || n != 7 {
		t.Errorf("second Sweep = %d, %v; want 7 removed", n, err)
	}
	if _, found, _ := s.Get(ctx, k(100)); !found {
		t.Error("entry without TTL was swept")
	}
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
		if err := s.Put(ctx, k(i), []byte("x"), time.Minute); err != nil {
			t.Fatal(err)
		}
	}
	clock.Advance(2 * time.Minute)
	if got, err := s.Sweep(ctx); err != nil || got != n {
		t.Fatalf("Sweep = %d, %v; want %d", got, err, n)
	}
	if st, _ := s.Stats(ctx); st.Entries != 0 || st.Bytes != 0 {
		t.Errorf("Stats after sweeping everything = %+v, want zero", st)
	}
	checkStore(t, s)
}

// TestBackgroundSweeper lets the sweeper goroutine, not the test, remove
// expired entries, observed by polling Stats.
func TestBackgroundSweeper(t *testing.T) {
	clock := newFakeClock()
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: 5 * time.Millisecond, Now: clock.Now})
	ctx := t.Context()
	for i := range 5 {
		if err := s.Put(ctx, k(i), []byte("v"), time.Second); err != nil {
			t.Fatal(err)
		}
	}
	clock.Advance(time.Minute)
	deadline := time.Now().Add(10 * time.Second)
	for {
		st, err := s.Stats(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if st.Entries == 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("sweeper left %d expired entries after 10s", st.Entries)
		}
		time.Sleep(5 * time.Millisecond) // polling interval
	}
	if err := s.Close(); err != nil { // stops the sweeper
		t.Fatal(err)
	}
}

func TestEvictionOldestFirst(t *testing.T) {
	clock := newFakeClock()
	const capBytes = 10_000
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1, Now: clock.Now, MaxBytes: capBytes, CompressMin: -1})
	ctx := t.Context()
	value := bytes.Repeat([]byte("v"), 1000-64-22) // 1000 stored bytes with key and header
	for i := range 10 {
		clock.Advance(time.Second)
		if err := s.Put(ctx, k(i), value, 0); err != nil {
			t.Fatal(err)
		}
	}
	if st, _ := s.Stats(ctx); st.Bytes != capBytes || st.Entries != 10 {
		t.Fatalf("Stats at the cap = %+v, want %d bytes in 10 entries", st, capBytes)
	}
	// Overwriting entry 0 makes it the newest; entry 1 is now the oldest.
	clock.Advance(time.Second)
	if err := s.Put(ctx, k(0), value, 0); err != nil {
		t.Fatal(err)
	}
	for i := 10; i < 13; i++ {
		clock.Advance(time.Second)
		if err := s.Put(ctx, k(i), value, 0); err != nil {
			t.Fatal(err)
		}
	}
	evicted := map[int]bool{1: true, 2: true, 3: true}
	for i := range 13 {
		_, found, err := s.Get(ctx, k(i))
		if err != nil || found == evicted[i] {
			t.Errorf("entry %d: found %v, err %v; want found %v", i, found, err, !evicted[i])
		}
	}
	if st, _ := s.Stats(ctx); st.Bytes > capBytes {
		t.Errorf("Bytes = %d, over the cap %d", st.Bytes, capBytes)
	}
	// One bigger entry evicts as many old ones as it needs.
	clock.Advance(time.Second)
	if err := s.Put(ctx, k(50), bytes.Repeat([]byte("w"), 3500), 0); err != nil {
		t.Fatal(err)
	}
	for _, i := range []int{4, 5, 6, 7} {
		if _, found, _ := s.Get(ctx, k(i)); found {
			t.Errorf("entry %d survived a 3.5 kB Put at the cap", i)
		}
	}
	if _, found, _ := s.Get(ctx, k(8)); !found {
		t.Error("entry 8 evicted although the cap was met without it")
	}
	err := s.Put(ctx, k(99), make([]byte, capBytes), 0)
	if !errors.Is(err, cache.ErrTooLarge) {
		t.Errorf("Put of an entry over the cap: err = %v, want cache.ErrTooLarge", err)
	}
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
			if err := s.Put(ctx, k(1), tc.value, 0); err != nil {
				t.Fatal(err)
			}
			st, _ := s.Stats(ctx)
			stored := int(st.Bytes) - 64 - 22
			if tc.wantShrunk && stored > tc.wantAtMost {
				t.Errorf("stored %d bytes for a %d-byte value, want at most %d", stored, len(tc.value), tc.wantAtMost)
			}
			if !tc.wantShrunk && stored != len(tc.value) {
				t.Errorf("stored %d bytes for a %d-byte value, want it stored as is", stored, len(tc.value))
			}
			got, found, err := s.Get(ctx, k(1))
			if err != nil || !found || !bytes.Equal(got, tc.value) {
				t.Errorf("Get = found %v, err %v, equal %v", found, err, bytes.Equal(got, tc.value))
			}
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
			if err != nil {
				t.Fatal(err)
			}
			for key, v := range values {
				if err := s.Put(ctx, key, v, 0); err != nil {
					t.Fatal(err)
				}
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			r := openStore(t, path, boltstore.Options{SweepInterval: -1, Codec: tc.reopen})
			for key, v := range values {
				got, found, err := r.Get(ctx, key)
				if err != nil || !found || !bytes.Equal(got, v) {
					t.Errorf("%s: found %v, err %v, equal %v", key, found, err, bytes.Equal(got, v))
				}
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
	if err != nil {
		t.Fatal(err)
	}
	second, err := boltstore.New(db, boltstore.Options{SweepInterval: -1})
	if err != nil {
		t.Fatal(err)
	}
	if err := second.Put(t.Context(), k(1), []byte("v"), 0); err != nil {
		t.Fatal(err)
	}
	if err := second.Close(); err != nil {
		t.Fatal(err)
	}
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
	if err != nil {
		t.Fatalf("after closing the New store: %v", err)
	}
	if _, found, err := owner.Get(t.Context(), k(1)); err != nil || !found {
		t.Errorf("owner Get = found %v, err %v", found, err)
	}
	if _, err := boltstore.New(nil, boltstore.Options{}); err == nil {
		t.Error("New(nil) succeeded")
	}
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
			if err := os.WriteFile(path, tc.content, 0o600); err != nil {
				t.Fatal(err)
			}
			s, err := boltstore.Open(path, boltstore.Options{LockTimeout: -1})
			if err == nil {
				_ = s.Close()
				t.Fatal("Open of a corrupt file succeeded")
			}
			if !errors.Is(err, boltstore.ErrCorrupt) || !strings.Contains(err.Error(), path) {
				t.Errorf("Open error = %v; want ErrCorrupt naming %s", err, path)
			}
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
			if err := s.Put(t.Context(), k(1), value, 0); err != nil {
				t.Fatal(err)
			}
			err := s.DB().Update(func(tx *bbolt.Tx) error {
				b := tx.Bucket([]byte("stint.cache.v1")).Bucket([]byte("entries"))
				rec := bytes.Clone(b.Get([]byte(k(1))))
				rec[len(rec)-3] ^= 0x40
				return b.Put([]byte(k(1)), rec)
			})
			if err != nil {
				t.Fatal(err)
			}
			if got, _, err := s.Get(t.Context(), k(1)); !errors.Is(err, boltstore.ErrCorrupt) {
				t.Errorf("Get of a damaged entry = %.20q, %v; want ErrCorrupt", got, err)
			}
			if err := s.Check(t.Context()); !errors.Is(err, boltstore.ErrCorrupt) {
				t.Errorf("Check = %v, want ErrCorrupt", err)
			}
			// Overwriting repairs it.
			if err := s.Put(t.Context(), k(1), value, 0); err != nil {
				t.Fatal(err)
			}
			checkStore(t, s)
		})
	}
}

func TestPutRejectsBadKeys(t *testing.T) {
	s := openStore(t, filepath.Join(t.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1})
	for _, key := range []string{"", strings.Repeat("k", bbolt.MaxKeySize)} {
		if err := s.Put(t.Context(), key, []byte("v"), 0); err == nil {
			t.Errorf("Put with a %d-byte key succeeded", len(key))
		}
	}
}
