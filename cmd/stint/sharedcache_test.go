package main

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// clusterConfig writes an open-mode config (no teams, no prices) whose
// cache, leases and run journal live on the Redis Cluster at addrs, with a
// data dir of its own.
func clusterConfig(t *testing.T, upURL string, addrs []string, redisExtra string) string {
	t.Helper()
	quoted := make([]string, len(addrs))
	for i, a := range addrs {
		quoted[i] = strconv.Quote(a)
	}
	return writeConfig(t, configHead(t.TempDir(), upURL)+fmt.Sprintf(`store:
  redis:
    addrs: [%s]
    timeout: 300ms
%s`, strings.Join(quoted, ", "), redisExtra))
}

// startReplicas runs n stint serve processes on the cluster.
func startReplicas(t *testing.T, n int, upURL string, cl *redistest.Cluster, redisExtra string) []*child {
	t.Helper()
	var out []*child
	for range n {
		out = append(out, startStint(t, nil, "serve", "--config", clusterConfig(t, upURL, cl.Addrs, redisExtra)))
	}
	return out
}

// answer is one reply read whole.
type answer struct {
	status int
	header http.Header
	body   []byte
	err    error // no reply within the deadline, or a broken one
}

// call posts a completions body to c and reads the answer, giving up after
// d; extra are header name, value pairs.
func call(c *child, d time.Duration, body string, extra ...string) answer {
	ctx, cancel := context.WithTimeout(context.Background(), d)
	defer cancel()
	req, _ := http.NewRequestWithContext(ctx, http.MethodPost, "http://"+c.addr+"/v1/completions", strings.NewReader(body))
	for i := 0; i+1 < len(extra); i += 2 {
		req.Header.Set(extra[i], extra[i+1])
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return answer{err: err}
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return answer{status: resp.StatusCode, header: resp.Header, body: b, err: err}
}

// scrape returns the sum of the samples of metric on c's /metrics, read
// with the replica configs' admin key (metrics need one where teams are
// configured).
func scrape(t *testing.T, c *child, metric string) float64 {
	t.Helper()
	req, err := http.NewRequest(http.MethodGet, "http://"+c.addr+"/metrics", nil)
	require.NoError(t, err)
	req.Header.Set("Authorization", "Bearer "+replicaAdminKey)
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err, "GET /metrics")
	defer resp.Body.Close()
	total := 0.0
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		line := sc.Text()
		name, value, ok := strings.Cut(line, " ")
		if !ok || (name != metric && !strings.HasPrefix(name, metric+"{")) {
			continue
		}
		f, err := strconv.ParseFloat(value, 64)
		require.NoError(t, err, "metric line %q", line)
		total += f
	}
	return total
}

// awaitMetric polls until the sum of metric over cs is want (bounded).
func awaitMetric(t *testing.T, cs []*child, want float64, metrics ...string) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		got := 0.0
		for _, c := range cs {
			for _, m := range metrics {
				got += scrape(t, c, m)
			}
		}
		if got == want {
			return
		}
		require.Falsef(t, time.Now().After(deadline), "%v summed over the replicas = %v, want %v", metrics, got, want)
		time.Sleep(20 * time.Millisecond) // polling interval
	}
}

// TestClusterReplicasShareCacheAndRuns runs two proxy processes on a real
// three-master Redis Cluster: an answer cached through one is a hit on the
// other, and a run recorded through one replays through the other with no
// upstream call.
func TestClusterReplicasShareCacheAndRuns(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	rs := startReplicas(t, 2, up.URL(), cl, "")
	a, b := rs[0], rs[1]
	for i := range 5 { // several keys, on different nodes
		body := greedyBody(300 + i)
		first := call(a, 10*time.Second, body)
		require.Falsef(t, first.err != nil || first.status != http.StatusOK || cacheOutcome(first.header) != "miss", "call %d on a: %v %d %q %s", i, first.err, first.status, cacheOutcome(first.header), first.body)
		got := call(b, 10*time.Second, body)
		assert.Falsef(t, got.err != nil || got.status != http.StatusOK || cacheOutcome(got.header) != "hit" || string(got.body) != string(first.body), "call %d on b: %v %d %q; want a hit with a's answer", i, got.err, got.status, cacheOutcome(got.header))
	}
	calls := up.Calls().Completions
	assert.Equal(t, 5, calls, "upstream calls = %d, want 5", calls)
	sampled := `{"model":"quill-small","prompt":"the hives cross at the weir","temperature":1,"max_tokens":6}`
	rec := call(a, 10*time.Second, sampled, "Stint-Run", "weir-run")
	require.Falsef(t, rec.err != nil || rec.status != http.StatusOK, "recorded call on a: %v %d %s", rec.err, rec.status, rec.body)
	before := up.Calls().Completions
	rep := call(b, 10*time.Second, sampled, "Stint-Run", "weir-run", "Stint-Run-Mode", "replay")
	assert.Falsef(t, rep.err != nil || rep.status != http.StatusOK || string(rep.body) != string(rec.body), "replay on b: %v %d %s; want a's recorded answer %s", rep.err, rep.status, rep.body, rec.body)
	calls = up.Calls().Completions
	assert.Equal(t, before, calls, "the replay made %d upstream calls, want 0", calls-before)
}

// TestClusterFiftyMissesOneCall sends 50 identical misses at once, spread
// over three replicas on the cluster, while the upstream holds the first
// call: one upstream call answers all 50.
func TestClusterFiftyMissesOneCall(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	rs := startReplicas(t, 3, up.URL(), cl, "")
	up.Block()
	const clients = 50
	body := greedyBody(4242)
	got := make([]answer, clients)
	var wg sync.WaitGroup
	for i := range clients {
		wg.Go(func() { got[i] = call(rs[i%len(rs)], 60*time.Second, body) })
	}
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, 1))
	// Every other request waits: on its replica's own call, or on the
	// replica holding the key.
	awaitMetric(t, rs, clients-1, "stint_coalesced_waiting", "stint_coalesced_remote_waiting")
	up.Release()
	wg.Wait()
	calls := up.Calls().Completions
	require.Equal(t, 1, calls, "upstream calls = %d for %d identical misses, want 1", calls, clients)
	count := map[string]int{}
	for i, g := range got {
		require.Falsef(t, g.err != nil || g.status != http.StatusOK || string(g.body) != string(got[0].body), "client %d: %v %d %s; want 200 with the one answer", i, g.err, g.status, g.body)
		count[cacheOutcome(g.header)]++
	}
	assert.Falsef(t, count["miss"] != 1 || count["shared"] != clients-1, "outcomes %v, want 1 miss and %d shared", count, clients-1)
}

// TestClusterLeaseHolderKilled kills (SIGKILL) the replica that holds a
// key's lease while its upstream call is held: the other replica, waiting
// on that lease, fetches the answer itself once the lease expires.
func TestClusterLeaseHolderKilled(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	rs := startReplicas(t, 2, up.URL(), cl, "    lease: 3s\n")
	a, b := rs[0], rs[1]
	up.Block()
	body := greedyBody(777)
	go call(a, 60*time.Second, body) // never answered: a dies
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, 1))
	gotB := make(chan answer, 1)
	go func() { gotB <- call(b, 60*time.Second, body) }()
	awaitMetric(t, []*child{b}, 1, "stint_coalesced_remote_waiting")
	require.NoError(t, a.cmd.Process.Kill())
	<-a.exited
	require.NoError(t, up.AwaitHeld(ctx, 0)) // a's call left with its connection
	up.Release()
	g := <-gotB
	require.Falsef(t, g.err != nil || g.status != http.StatusOK || cacheOutcome(g.header) != "miss", "b after a died: %v %d %q %s; want 200 from b's own call", g.err, g.status, cacheOutcome(g.header), g.body)
	calls := up.Calls().Completions
	assert.Equal(t, 2, calls, "upstream calls = %d, want 2 (a's lost one, b's)", calls)
}

// TestClusterDownDegradesAndRecovers stops every node of the cluster while
// two replicas are under load: every request is still answered from
// upstream before its deadline, those after the stop say
// Cache-Status detail=store-unavailable; after the cluster is back the same
// processes cache and hit again.
func TestClusterDownDegradesAndRecovers(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	// No in-memory tier: every lookup needs Redis.
	rs := startReplicas(t, 2, up.URL(), cl, "cache:\n  hot_bytes: 0\n")
	const deadline = 10 * time.Second
	stop := make(chan struct{})
	var (
		mu      sync.Mutex
		results []answer
		wg      sync.WaitGroup
	)
	for w := range 4 {
		wg.Go(func() {
			for i := 0; ; i++ {
				select {
				case <-stop:
					return
				default:
				}
				g := call(rs[w%2], deadline, greedyBody(1000+(w*7+i)%13))
				mu.Lock()
				results = append(results, g)
				mu.Unlock()
			}
		})
	}
	awaitCount := func(n int) {
		for {
			mu.Lock()
			got := len(results)
			mu.Unlock()
			if got >= n {
				return
			}
			time.Sleep(10 * time.Millisecond) // polling interval
		}
	}
	awaitCount(20)
	cl.Stop()
	mu.Lock()
	mark := len(results)
	mu.Unlock()
	awaitCount(mark + 40)
	cl.Restart(t)
	close(stop)
	wg.Wait()
	degraded := 0
	for i, g := range results {
		require.Falsef(t, g.err != nil || g.status != http.StatusOK, "request %d under load: %v %d %s; want every one answered before its deadline", i, g.err, g.status, g.body)
		if storeDown(g.header) {
			degraded++
		}
	}
	assert.Falsef(t, degraded < 30, "%d of the requests after the stop said the store was unavailable, want most of 40", degraded)
	n := scrape(t, rs[0], "stint_store_degraded_requests_total") + scrape(t, rs[1], "stint_store_degraded_requests_total")
	assert.Falsef(t, n < float64(degraded), "degraded-requests metric %v, below the %d degraded answers", n, degraded)
	// Back without a restart: once each replica reaches the cluster again
	// (each waits out its own cool-down after its last failure), a fresh
	// answer stored through one replica is a hit on the other.
	wait := time.Now().Add(30 * time.Second)
	for i, r := range rs {
		probe := greedyBody(5001 + i) // a body of each replica's own, so no hot tier holds the checked one
		for {
			g := call(r, deadline, probe)
			if g.err == nil && g.status == http.StatusOK && !storeDown(g.header) {
				break
			}
			require.Falsef(t, time.Now().After(wait), "replica %d after the cluster came back: %v %d %q", i, g.err, g.status, g.header.Get("Cache-Status"))
			time.Sleep(50 * time.Millisecond) // polling interval
		}
	}
	body := greedyBody(5000)
	g := call(rs[0], deadline, body)
	require.Falsef(t, g.err != nil || g.status != http.StatusOK || storeDown(g.header), "store through replica 0 after recovery: %v %d %q", g.err, g.status, g.header.Get("Cache-Status"))
	g = call(rs[1], deadline, body)
	assert.Falsef(t, g.err != nil || cacheOutcome(g.header) != "hit", "repeat on the other replica after recovery: %v %q, want a hit", g.err, cacheOutcome(g.header))
}

// TestClusterCoalescedMissesChargeOnce is TestClusterFiftyMissesOneCall
// with budgets on the same cluster: the one upstream call is charged once,
// the answers shared across replicas cost nothing, and the shared ledger
// holds exactly what the upstream billed.
func TestClusterCoalescedMissesChargeOnce(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	var rs []*child
	var key string
	for range 3 {
		var path string
		path, key = redisConfig(t, up.URL(), strings.Join(cl.Addrs, ","), "1.00")
		rs = append(rs, startStint(t, nil, "serve", "--config", path))
	}
	up.Block()
	const clients = 30
	body := greedyBody(9090)
	got := make([]answer, clients)
	var wg sync.WaitGroup
	for i := range clients {
		wg.Go(func() { got[i] = call(rs[i%len(rs)], 60*time.Second, body, "Authorization", "Bearer "+key) })
	}
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, 1))
	awaitMetric(t, rs, clients-1, "stint_coalesced_waiting", "stint_coalesced_remote_waiting")
	up.Release()
	wg.Wait()
	calls := up.Calls().Completions
	require.Equal(t, 1, calls, "upstream calls = %d, want 1", calls)
	var cost int64
	for i, g := range got {
		require.Falsef(t, g.err != nil || g.status != http.StatusOK, "client %d: %v %d %s", i, g.err, g.status, g.body)
		cost += usdNanos(t, g.header.Get("Stint-Cost-Usd"))
	}
	billed := billedNanos(up.Billed())
	ledger := redisledger.New(cl.Client(t), redisledger.Options{})
	b, err := ledger.Balance(context.Background(), time.Now(), budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Falsef(t, billed == 0 || cost != billed || int64(b.Spent) != billed || b.Held != 0, "upstream billed %d nano-USD, answers' cost headers sum to %d, ledger spent %d, held %d: want all equal, nothing held",
		billed, cost, b.Spent, b.Held)
}
