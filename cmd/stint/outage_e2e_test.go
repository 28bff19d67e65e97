package main

import (
	"net/http"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestSharedCacheOutageServesSeenAnswers runs two replicas with the default
// shared cache and budgets on one real redis-server, and stops it mid-run,
// long after the answers left the hot tier's freshness window (hot_ttl):
// every answer a replica had seen (fetched itself, or read from Redis) is
// still a hit on that replica, marked Cache-Status detail=store-unavailable; an
// answer it never saw is a miss, refused because budgets fail closed; and
// nothing reaches the upstream. Once Redis is back the replicas read it
// again without a restart, and its answers win over the copies.
func TestSharedCacheOutageServesSeenAnswers(t *testing.T) {
	rs := redistest.Start(t)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const hotTTL = 100 * time.Millisecond
	var replicas []*child
	var key string
	for range 2 {
		var path string
		path, key = redisConfigWith(t, up.URL(), rs.Addr, "5.00", "    hot_ttl: 100ms\n")
		replicas = append(replicas, startStint(t, nil, "serve", "--config", path))
	}
	a, b := replicas[0], replicas[1]
	fetched := []int{1, 2, 3, 4, 5, 6}
	for _, i := range fetched {
		resp, body := post(t, a, key, greedyBody(i))
		require.Equal(t, http.StatusOK, resp.StatusCode, "%s", body)
		require.Equal(t, "miss", cacheOutcome(resp.Header))
	}
	awaitMetric(t, []*child{a}, 0, "stint_store_pending_writes")
	readByB := fetched[:3]
	for _, i := range readByB {
		resp, body := post(t, b, key, greedyBody(i))
		require.Equal(t, http.StatusOK, resp.StatusCode, "%s", body)
		require.Equal(t, "hit", cacheOutcome(resp.Header), "B reads A's answer from Redis")
	}
	calls := up.Calls().Completions
	time.Sleep(3 * hotTTL) // every answer is now past its in-memory freshness

	rs.Stop()
	for round := range 3 { // for as long as the outage lasts, not once
		for _, c := range []struct {
			name string
			c    *child
			seen []int
		}{{"A", a, fetched}, {"B", b, readByB}} {
			for _, i := range c.seen {
				resp, body := post(t, c.c, key, greedyBody(i))
				assert.Equal(t, http.StatusOK, resp.StatusCode, "round %d: %s's answer %d: %s", round, c.name, i, body)
				assert.Equal(t, "hit", cacheOutcome(resp.Header), "round %d: %s's answer %d", round, c.name, i)
				assert.True(t, storeDown(resp.Header), "round %d: %s's answer %d", round, c.name, i)
			}
		}
	}
	resp, body := post(t, b, key, greedyBody(fetched[5])) // in Redis, never seen by B
	assert.Equal(t, http.StatusServiceUnavailable, resp.StatusCode, "an answer B never saw, with budgets away: %s", body)
	assert.Equal(t, calls, up.Calls().Completions, "nothing reached the upstream during the outage")

	// The test's Redis comes back empty (no persistence): a replica then
	// takes Redis's word over its copy, so B's stale answer gives way to a
	// miss, whose answer A then reads from Redis in place of its own copy.
	rs.Restart(t)
	var last *http.Response
	require.Eventually(t, func() bool {
		last, _ = post(t, b, key, greedyBody(1))
		return last.StatusCode == http.StatusOK && !storeDown(last.Header)
	}, 30*time.Second, 50*time.Millisecond, "B reads Redis again once it is back")
	assert.Equal(t, "miss", cacheOutcome(last.Header), "Redis came back without the answer")
	awaitMetric(t, []*child{b}, 0, "stint_store_pending_writes")
	require.Eventually(t, func() bool {
		last, _ = post(t, a, key, greedyBody(1))
		return last.StatusCode == http.StatusOK && !storeDown(last.Header)
	}, 30*time.Second, 50*time.Millisecond, "A reads Redis again once it is back")
	assert.Equal(t, "hit", cacheOutcome(last.Header))
	assert.Equal(t, calls+1, up.Calls().Completions, "one upstream call after the outage: B's miss")
}
