// Package storetest is the conformance suite every cache.Store backend runs:
// the embedded file store, the hot tier, and any later backend.
//
//	func TestConformance(t *testing.T) {
//		storetest.Run(t, func(t *testing.T) cache.Store { return openMyStore(t) })
//	}
package storetest

import (
	"bytes"
	"context"
	"fmt"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
)

// Run runs the suite as parallel subtests of t. newStore returns a fresh,
// empty, open store for each subtest and must be safe to call from parallel
// subtests. Run closes every store it gets (some subtests
// twice), so a cleanup newStore registers must tolerate a closed store.
//
// The suite uses only the cache.Store contract: values round-trip exactly
// (empty and multi-megabyte ones included); a missing, deleted or expired key
// is found=false without error; Put overwrites; ttl <= 0 keeps an entry; the
// store is safe for concurrent use; after Close every method returns
// cache.ErrClosed; a done context makes every method fail with its error.
// TTL expiry is observed by polling with a deadline, never by sleeping a
// fixed time, so it works with any backend's timer resolution.
//
// The suite is a table of parallel subtests, each on a fresh store, rather
// than a testify suite: testify's suites share one value across their
// tests and do not run them in parallel.
func Run(t *testing.T, newStore func(t *testing.T) cache.Store) {
	t.Helper()
	tests := []struct {
		name string
		fn   func(t *testing.T, s cache.Store)
	}{
		{"MissingKey", testMissingKey},
		{"PutGet", testPutGet},
		{"Overwrite", testOverwrite},
		{"Delete", testDelete},
		{"PutCopiesValue", testPutCopiesValue},
		{"TTLExpiry", testTTLExpiry},
		{"NoTTLPersists", testNoTTLPersists},
		{"LargeValues", testLargeValues},
		{"ManyKeys", testManyKeys},
		{"Concurrent", testConcurrent},
		{"ContextCancelled", testContextCancelled},
		{"CloseThenUse", testCloseThenUse},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel() // each subtest has its own store; durable stores mostly wait on fsync
			s := newStore(t)
			defer func() { assert.NoError(t, s.Close(), "Close") }()
			tc.fn(t, s)
		})
	}
}

// key makes a realistic key: a cache.Key digest.
func key(name string) string {
	return cache.Key(cache.KeyParts{Namespace: "storetest", Endpoint: "/v1/completions", Model: "suite-model"}, []byte(name))
}

// completion is a completion-shaped JSON value of about n bytes.
func completion(seed uint64, n int) []byte {
	r := rand.New(rand.NewPCG(seed, 7))
	words := []string{"lantern", "orchard", "quiet", "river", "the", "a", "of", "copper", "tide", "north"}
	var b bytes.Buffer
	fmt.Fprintf(&b, `{"id":"cmpl-%d","object":"text_completion","model":"suite-model","choices":[{"index":0,"text":"`, seed)
	for b.Len() < n-80 {
		b.WriteString(words[r.IntN(len(words))])
		b.WriteByte(' ')
	}
	fmt.Fprintf(&b, `","finish_reason":"length"}],"usage":{"prompt_tokens":%d,"completion_tokens":%d}}`, r.IntN(50), r.IntN(500))
	return b.Bytes()
}

func mustGet(t *testing.T, s cache.Store, k string, want []byte) {
	t.Helper()
	got, found, err := s.Get(t.Context(), k)
	require.NoError(t, err, "Get(%.12s…)", k)
	require.True(t, found, "Get(%.12s…): want the stored value", k)
	require.True(t, bytes.Equal(got, want), "Get(%.12s…) = %d bytes %.40q; want %d bytes %.40q", k, len(got), got, len(want), want)
}

func mustMiss(t *testing.T, s cache.Store, k string) {
	t.Helper()
	got, found, err := s.Get(t.Context(), k)
	require.NoError(t, err, "Get(%.12s…)", k)
	require.False(t, found, "Get(%.12s…) = %q: want a miss", k, got)
	require.Nil(t, got, "Get(%.12s…) of a miss", k)
}

func mustPut(t *testing.T, s cache.Store, k string, v []byte, ttl time.Duration) {
	t.Helper()
	require.NoError(t, s.Put(t.Context(), k, v, ttl), "Put(%.12s…, %d bytes, %v)", k, len(v), ttl)
}

func testMissingKey(t *testing.T, s cache.Store) {
	mustMiss(t, s, key("never stored"))
	mustPut(t, s, key("other"), []byte("x"), 0)
	mustMiss(t, s, key("never stored"))
}

func testPutGet(t *testing.T, s cache.Store) {
	values := []struct {
		name  string
		value []byte
	}{
		{"empty", []byte{}},
		{"one byte", []byte("x")},
		{"binary", []byte{0, 1, 2, 0xff, 0, '\n'}},
		{"small json", completion(1, 100)},
		{"typical json", completion(2, 1500)},
	}
	for _, v := range values {
		mustPut(t, s, key(v.name), v.value, time.Hour)
	}
	for _, v := range values {
		mustGet(t, s, key(v.name), v.value)
	}
}

func testOverwrite(t *testing.T, s cache.Store) {
	k := key("overwritten")
	mustPut(t, s, k, completion(1, 2000), 0)
	mustPut(t, s, k, []byte("short"), time.Hour)
	mustGet(t, s, k, []byte("short"))
	mustPut(t, s, k, completion(3, 500), 0)
	mustGet(t, s, k, completion(3, 500))
}

func testDelete(t *testing.T, s cache.Store) {
	k, other := key("deleted"), key("kept")
	mustPut(t, s, k, []byte("v"), time.Hour)
	mustPut(t, s, other, []byte("w"), time.Hour)
	require.NoError(t, s.Delete(t.Context(), k), "Delete")
	mustMiss(t, s, k)
	mustGet(t, s, other, []byte("w"))
	assert.NoError(t, s.Delete(t.Context(), key("never stored")), "Delete of a missing key")
	mustPut(t, s, k, []byte("again"), 0)
	mustGet(t, s, k, []byte("again"))
}

func testPutCopiesValue(t *testing.T, s cache.Store) {
	k := key("copied")
	v := []byte("original value")
	mustPut(t, s, k, v, 0)
	copy(v, "XXXXXXXX")
	mustGet(t, s, k, []byte("original value"))
}

func testTTLExpiry(t *testing.T, s cache.Store) {
	short, long, forever := key("short ttl"), key("long ttl"), key("no ttl")
	mustPut(t, s, long, []byte("long"), time.Hour)
	mustPut(t, s, forever, []byte("forever"), 0)
	mustPut(t, s, short, []byte("short"), 50*time.Millisecond)
	deadline := time.Now().Add(10 * time.Second)
	for {
		_, found, err := s.Get(t.Context(), short)
		require.NoError(t, err, "Get")
		if !found {
			break
		}
		require.False(t, time.Now().After(deadline), "entry with a 50ms TTL still found after 10s")
		time.Sleep(5 * time.Millisecond) // polling interval, not ordering
	}
	mustGet(t, s, long, []byte("long"))
	mustGet(t, s, forever, []byte("forever"))
	// A new Put of an expired key stores it again.
	mustPut(t, s, short, []byte("back"), time.Hour)
	mustGet(t, s, short, []byte("back"))
}

func testNoTTLPersists(t *testing.T, s cache.Store) {
	for _, ttl := range []time.Duration{0, -time.Second} {
		k := key(fmt.Sprint("ttl ", ttl))
		mustPut(t, s, k, []byte("kept"), ttl)
		mustGet(t, s, k, []byte("kept"))
	}
}

func testLargeValues(t *testing.T, s cache.Store) {
	random := make([]byte, 3<<20)
	r := rand.New(rand.NewPCG(11, 13))
	for i := range random {
		random[i] = byte(r.Uint32())
	}
	repetitive := bytes.Repeat(completion(5, 4000), 1000) // about 4 MB, compresses well
	mustPut(t, s, key("random"), random, 0)
	mustPut(t, s, key("repetitive"), repetitive, 0)
	mustGet(t, s, key("random"), random)
	mustGet(t, s, key("repetitive"), repetitive)
}

func testManyKeys(t *testing.T, s cache.Store) {
	const n = 100
	for i := range n {
		mustPut(t, s, key(fmt.Sprint("many ", i)), completion(uint64(i), 50+i*7), 0)
	}
	for i := range n {
		mustGet(t, s, key(fmt.Sprint("many ", i)), completion(uint64(i), 50+i*7))
	}
}

// testConcurrent runs writers and readers on private and shared keys. A
// reader of a shared key must see nothing or one of the values written.
func testConcurrent(t *testing.T, s cache.Store) {
	const workers, rounds = 8, 20
	shared := key("shared")
	valid := map[string]bool{}
	for w := range workers {
		valid[string(completion(uint64(1000+w), 300))] = true
	}
	ctx := t.Context()
	var wg sync.WaitGroup
	errs := make(chan error, workers)
	for w := range workers {
		wg.Go(func() {
			mine := completion(uint64(1000+w), 300)
			for i := range rounds {
				k := key(fmt.Sprintf("worker %d item %d", w, i))
				v := completion(uint64(w*rounds+i), 200+i*10)
				if err := s.Put(ctx, k, v, time.Hour); err != nil {
					errs <- fmt.Errorf("worker %d: Put: %w", w, err)
					return
				}
				if i%4 == 0 {
					if err := s.Put(ctx, shared, mine, time.Hour); err != nil {
						errs <- fmt.Errorf("worker %d: Put shared: %w", w, err)
						return
					}
				}
				got, found, err := s.Get(ctx, k)
				if err != nil || !found || !bytes.Equal(got, v) {
					errs <- fmt.Errorf("worker %d: Get own key = found %v, err %v, equal %v", w, found, err, bytes.Equal(got, v))
					return
				}
				got, found, err = s.Get(ctx, shared)
				if err != nil || (found && !valid[string(got)]) {
					errs <- fmt.Errorf("worker %d: Get shared key = found %v, err %v, a written value %v", w, found, err, valid[string(got)])
					return
				}
			}
		})
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		assert.NoError(t, err)
	}
	got, found, err := s.Get(ctx, shared)
	require.NoError(t, err, "shared key after the writers")
	assert.True(t, found && valid[string(got)], "shared key after the writers: found %v, a written value %v", found, valid[string(got)])
}

func testContextCancelled(t *testing.T, s cache.Store) {
	k := key("ctx")
	mustPut(t, s, k, []byte("v"), 0)
	ctx, cancel := context.WithCancel(t.Context())
	cancel()
	_, _, err := s.Get(ctx, k)
	assert.ErrorIs(t, err, context.Canceled, "Get with a cancelled context")
	assert.ErrorIs(t, s.Put(ctx, key("ctx put"), []byte("v"), 0), context.Canceled, "Put with a cancelled context")
	assert.ErrorIs(t, s.Delete(ctx, k), context.Canceled, "Delete with a cancelled context")
	dctx, dcancel := context.WithDeadline(t.Context(), time.Now().Add(-time.Second))
	defer dcancel()
	_, _, err = s.Get(dctx, k)
	assert.ErrorIs(t, err, context.DeadlineExceeded, "Get past the deadline")
	// The failed calls changed nothing.
	mustGet(t, s, k, []byte("v"))
	mustMiss(t, s, key("ctx put"))
}

func testCloseThenUse(t *testing.T, s cache.Store) {
	k := key("closed")
	mustPut(t, s, k, []byte("v"), 0)
	require.NoError(t, s.Close(), "Close")
	ctx := t.Context()
	_, _, err := s.Get(ctx, k)
	assert.ErrorIs(t, err, cache.ErrClosed, "Get after Close")
	assert.ErrorIs(t, s.Put(ctx, k, []byte("w"), 0), cache.ErrClosed, "Put after Close")
	assert.ErrorIs(t, s.Delete(ctx, k), cache.ErrClosed, "Delete after Close")
}
