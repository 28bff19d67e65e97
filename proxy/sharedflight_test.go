package proxy_test

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// sharedRigs are proxies on one real Redis, as replicas behind a load
// balancer: every rig sends its misses to the first rig's upstream.
type sharedRigs struct {
	redis *redistest.Server
	up    *upstreamtest.Server
	rigs  []*rig
}

// newSharedRigs starts a redis-server and n proxies sharing it, each with
// its own Redis store (and hot tier unless hotBytes is -1) and
// SharedFlights on.
func newSharedRigs(t *testing.T, n int, hotBytes int64) *sharedRigs {
	t.Helper()
	srv := redistest.Start(t)
	c := redis.NewClient(&redis.Options{Addr: srv.Addr, ContextTimeoutEnabled: true, MaxRetries: -1,
		DialTimeout: 300 * time.Millisecond, ReadTimeout: 300 * time.Millisecond, WriteTimeout: 300 * time.Millisecond})
	t.Cleanup(func() { c.Close() })
	sr := &sharedRigs{redis: srv}
	for i := range n {
		rs, err := redisstore.New(c, redisstore.Options{Prefix: "replicas", Timeout: 300 * time.Millisecond, LeaseTTL: 2 * time.Second})
		require.NoError(t, err)
		store := cache.NewHot(rs, cache.HotOptions{MaxBytes: hotBytes, MaxAge: time.Second})
		t.Cleanup(func() { _ = store.Close() })
		r := newRig(t, func(o *proxy.Options) {
			o.Store, o.SharedFlights = store, rs
			if i > 0 {
				o.Upstreams = []proxy.Upstream{{Name: "fake", BaseURL: sr.up.URL(), Key: upstreamKey, Timeout: 30 * time.Second}}
			}
		})
		if i == 0 {
			sr.up = r.up
		}
		sr.rigs = append(sr.rigs, r)
	}
	return sr
}

// waiting sums, over the rigs, the requests waiting on a call made by
// another request of their own process or of another replica.
func (sr *sharedRigs) waiting() float64 {
	total := 0.0
	for _, r := range sr.rigs {
		total += r.metric("stint_coalesced_waiting") + r.metric("stint_coalesced_remote_waiting")
	}
	return total
}

func TestSharedStoreHitOnAnotherReplica(t *testing.T) {
	noLeaks(t)
	sr := newSharedRigs(t, 2, 8<<20)
	a, b := sr.rigs[0], sr.rigs[1]
	first := a.complete(greedy("the ferry leaves at dawn"))
	require.Equal(t, http.StatusOK, first.status, "first call on a: %d %q %s", first.status, first.cache(), first.body)
	require.Equal(t, proxy.OutcomeMiss, first.cache(), "first call on a: %d %q %s", first.status, first.cache(), first.body)
	got := b.complete(greedy("the ferry leaves at dawn"))
	assert.Equal(t, http.StatusOK, got.status, "same call on b: %d %q, same body %v; want a hit with a's answer", got.status, got.cache(), string(got.body) == string(first.body))
	assert.Equal(t, proxy.OutcomeHit, got.cache(), "same call on b: %d %q, same body %v; want a hit with a's answer", got.status, got.cache(), string(got.body) == string(first.body))
	assert.Equal(t, string(first.body), string(got.body), "same call on b: %d %q, same body %v; want a hit with a's answer", got.status, got.cache(), string(got.body) == string(first.body))
	calls := sr.up.Calls().Completions
	assert.Equal(t, 1, calls, "upstream calls = %d, want 1", calls)
}

// TestSharedFlightsMakeOneCall sends identical misses to two replicas at
// once while the upstream holds the first call: one upstream call answers
// all of them, the others coalesced locally or across replicas.
func TestSharedFlightsMakeOneCall(t *testing.T) {
	noLeaks(t)
	sr := newSharedRigs(t, 2, 8<<20)
	sr.up.Block()
	const clients = 20
	var wg sync.WaitGroup
	got := make([]response, clients)
	for i := range clients {
		wg.Go(func() { got[i] = sr.rigs[i%2].complete(greedy("twenty keepers ask two ferries")) })
	}
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	require.NoError(t, sr.up.AwaitHeld(ctx, 1))
	waitFor(t, "19 waiting requests", func() bool { return sr.waiting() == clients-1 })
	sr.up.Release()
	wg.Wait()
	calls := sr.up.Calls().Completions
	require.Equal(t, 1, calls, "upstream calls = %d, want 1", calls)
	count := map[string]int{}
	for i, g := range got {
		require.Equal(t, http.StatusOK, g.status, "client %d: %d %s; want 200 with the one answer", i, g.status, g.body)
		require.Equal(t, string(got[0].body), string(g.body), "client %d: %d %s; want 200 with the one answer", i, g.status, g.body)
		count[g.cache()]++
	}
	assert.False(t, count[proxy.OutcomeMiss] != 1 || count[proxy.OutcomeShared] != clients-1, "outcomes %v, want 1 miss and %d shared", count, clients-1)
}

// TestSharedFlightsHolderFailure: the replica holding the key gets an
// upstream error; the waiting replica then fetches the answer itself.
func TestSharedFlightsHolderFailure(t *testing.T) {
	noLeaks(t)
	sr := newSharedRigs(t, 2, 8<<20)
	a, b := sr.rigs[0], sr.rigs[1]
	sr.up.Block()
	sr.up.FailNext(1, upstreamtest.Fault{Status: http.StatusInternalServerError})
	body := greedy("the lock keeper is out")
	ra := make(chan response, 1)
	go func() { ra <- a.complete(body) }()
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	require.NoError(t, sr.up.AwaitHeld(ctx, 1))
	rb := make(chan response, 1)
	go func() { rb <- b.complete(body) }()
	waitFor(t, "b waiting on a's call", func() bool { return b.metric("stint_coalesced_remote_waiting") == 1 })
	sr.up.Release()
	got := <-ra
	assert.Equal(t, http.StatusInternalServerError, got.status, "a: %d %s, want the upstream's 500", got.status, got.body)
	got = <-rb
	assert.Equal(t, http.StatusOK, got.status, "b: %d %q %s, want 200 from its own call", got.status, got.cache(), got.body)
	assert.Equal(t, proxy.OutcomeMiss, got.cache(), "b: %d %q %s, want 200 from its own call", got.status, got.cache(), got.body)
	calls := sr.up.Calls().Completions
	assert.Equal(t, 2, calls, "upstream calls = %d, want 2 (a's failed one, b's)", calls)
}

// TestSharedStoreDownDegrades stops Redis under a replica (hot tier off, so
// every lookup needs Redis): requests are answered from upstream, marked
// Cache-Status detail=store-unavailable and counted; after Redis is back the same
// process caches and hits again.
func TestSharedStoreDownDegrades(t *testing.T) {
	noLeaks(t)
	sr := newSharedRigs(t, 1, -1)
	r := sr.rigs[0]
	before := r.complete(greedy("before the outage"))
	require.Equal(t, http.StatusOK, before.status, "with Redis up: %s", before.body)
	require.Equal(t, "", before.detail(), "with Redis up")
	// A write still landing is served from memory, so the first answer's
	// write must be in Redis before it stops, and each call during the
	// outage asks for a different text.
	waitFor(t, "the first write to land", func() bool { return r.metric("stint_store_pending_writes") == 0 })
	sr.redis.Stop()
	for i, body := range []map[string]any{greedy("before the outage"), greedy("during the outage"), greedy("streamed during the outage", "stream", true)} {
		got := completeWithin(t, r, 10*time.Second, body)
		assert.Equal(t, http.StatusOK, got.status, "call %d with Redis down: %d %q %q %s; want 200 miss, store unavailable", i, got.status, got.cache(), got.detail(), got.body)
		assert.Equal(t, proxy.OutcomeMiss, got.cache(), "call %d with Redis down: %d %q %q %s; want 200 miss, store unavailable", i, got.status, got.cache(), got.detail(), got.body)
		assert.Equal(t, proxy.DetailStoreUnavailable, got.detail(), "call %d with Redis down: %d %q %q %s; want 200 miss, store unavailable", i, got.status, got.cache(), got.detail(), got.body)
	}
	if resp, err := http.Get(r.srv.URL + "/readyz"); assert.NoError(t, err, "/readyz with the shared store down") {
		assert.Equal(t, http.StatusOK, resp.StatusCode, "/readyz with the shared store down: want 200 (the replica still answers)")
		resp.Body.Close()
	}
	n := r.metric("stint_store_degraded_requests_total")
	assert.Equal(t, float64(3), n, "degraded requests = %v, want 3", n)
	sr.redis.Restart(t)
	waitFor(t, "a call with the store back", func() bool {
		return r.complete(greedy("after the outage")).detail() == ""
	})
	got := r.complete(greedy("after the outage"))
	assert.Equal(t, proxy.OutcomeHit, got.cache(), "repeat after Redis came back: %q, want a hit without a restart", got.cache())
}

// completeWithin posts a completions call that must be answered within d.
func completeWithin(t *testing.T, r *rig, d time.Duration, body map[string]any) response {
	t.Helper()
	raw, _ := json.Marshal(body)
	c := &http.Client{Timeout: d}
	resp, err := c.Post(r.srv.URL+"/v1/completions", "application/json", bytes.NewReader(raw))
	require.NoError(t, err, "no answer within %v", d)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return response{status: resp.StatusCode, header: resp.Header, body: b, readErr: err}
}

// TestSharedFlightsAfterAStream: the replica holding the key streams the
// upstream's answer to its client; the waiting replica serves the same
// answer, assembled and stored by the holder, as JSON.
func TestSharedFlightsAfterAStream(t *testing.T) {
	noLeaks(t)
	sr := newSharedRigs(t, 2, 8<<20)
	a, b := sr.rigs[0], sr.rigs[1]
	sr.up.Block()
	ra := make(chan response, 1)
	go func() { ra <- a.complete(greedy("the barge sings as it streams", "stream", true)) }()
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	require.NoError(t, sr.up.AwaitHeld(ctx, 1))
	rb := make(chan response, 1)
	go func() { rb <- b.complete(greedy("the barge sings as it streams")) }()
	waitFor(t, "b waiting on a's call", func() bool { return b.metric("stint_coalesced_remote_waiting") == 1 })
	sr.up.Release()
	gotA, gotB := <-ra, <-rb
	require.Equal(t, http.StatusOK, gotA.status, "a's stream: %d %q", gotA.status, gotA.cache())
	require.Equal(t, proxy.OutcomeMiss, gotA.cache(), "a's stream: %d %q", gotA.status, gotA.cache())
	texts, _ := streamedText(t, false, events(t, gotA.body))
	require.Equal(t, http.StatusOK, gotB.status, "b: %d %q %s; want 200 shared", gotB.status, gotB.cache(), gotB.body)
	require.Equal(t, proxy.OutcomeShared, gotB.cache(), "b: %d %q %s; want 200 shared", gotB.status, gotB.cache(), gotB.body)
	if c := decodeCompletion(t, gotB.body); assert.Len(t, c.Choices, 1, "b's choices") {
		assert.Equal(t, texts[0], c.Choices[0].Text, "b's text, want what a streamed")
	}
	calls := sr.up.Calls().Completions
	assert.Equal(t, 1, calls, "upstream calls = %d, want 1", calls)
}

// TestSharedStoreSlowIsBounded pauses Redis (CLIENT PAUSE: it accepts
// connections but answers nothing, as an overloaded server): a request
// waits for it no longer than the store's timeout, then is answered from
// upstream, marked unavailable, well before its own deadline.
func TestSharedStoreSlowIsBounded(t *testing.T) {
	noLeaks(t)
	sr := newSharedRigs(t, 1, -1)
	r := sr.rigs[0]
	admin := sr.redis.Client(t)
	require.NoError(t, admin.Do(t.Context(), "CLIENT", "PAUSE", 4000, "ALL").Err())
	defer admin.Do(context.Background(), "CLIENT", "UNPAUSE")
	got := completeWithin(t, r, 2500*time.Millisecond, greedy("while the lock is jammed"))
	assert.Equal(t, http.StatusOK, got.status, "with Redis paused: %d %q %s; want 200 from upstream, store unavailable", got.status, got.detail(), got.body)
	assert.Equal(t, proxy.DetailStoreUnavailable, got.detail(), "with Redis paused: %d %q %s; want 200 from upstream, store unavailable", got.status, got.detail(), got.body)
}
