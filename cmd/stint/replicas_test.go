package main

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// Prices of the fake's model in these tests (invented), USD per million
// tokens, as in spendConfig.
const (
	replicaInputPrice  = 2.0
	replicaOutputPrice = 6.0
)

// redisConfig writes a config whose budgets live on the Redis at addr, with
// a data dir of its own (each replica keeps its own cache file).
func redisConfig(t *testing.T, upURL, redisAddr, budgetUSD string, extra ...string) (path, key string) {
	t.Helper()
	return redisConfigWith(t, upURL, redisAddr, budgetUSD, "", extra...)
}

// redisConfigWith is redisConfig with more store.redis settings (lines
// indented by four spaces). redisAddr may list several addresses, comma
// separated: the nodes of a cluster.
func redisConfigWith(t *testing.T, upURL, redisAddr, budgetUSD, redisExtra string, extra ...string) (path, key string) {
	t.Helper()
	key = "lab-replica-key"
	return writeConfig(t, configHead(t.TempDir(), upURL)+fmt.Sprintf(`teams:
  - name: lab
    keys: ["sha256:%s"]
    budget: {usd: %s, per: total}
prices:
  quill-small: {input: %v, output: %v}   # invented test prices
store:
  redis:
    addrs: [%s]
    timeout: 300ms
%sadmin:
  keys: ["sha256:%s"]
%s`, keyHash(key), budgetUSD, replicaInputPrice, replicaOutputPrice, quoteAddrs(redisAddr), redisExtra, keyHash(replicaAdminKey), strings.Join(extra, ""))), key
}

// quoteAddrs turns "a,b" into the YAML list items "a", "b".
func quoteAddrs(addrs string) string {
	parts := strings.Split(addrs, ",")
	for i, a := range parts {
		parts[i] = strconv.Quote(a)
	}
	return strings.Join(parts, ", ")
}

// replicaAdminKey is the admin key of the replica configs.
const replicaAdminKey = "depot-admin-key"

// billedNanos prices tokens at the test prices (hand-worked: tokens × USD
// per million × 1e9 nanos / 1e6 = tokens × price × 1000).
func billedNanos(tk upstreamtest.Tokens) int64 {
	return int64(tk.Prompt)*int64(replicaInputPrice*1000) + int64(tk.Completion)*int64(replicaOutputPrice*1000)
}

func usdNanos(t *testing.T, s string) int64 {
	t.Helper()
	f, err := strconv.ParseFloat(s, 64)
	if err != nil {
		t.Fatalf("USD %q: %v", s, err)
	}
	n, err := budget.FromUSD(f)
	if err != nil {
		t.Fatal(err)
	}
	return int64(n)
}

// TestReplicasOnRedisNeverOverspend runs three proxy processes on one real
// Redis and 64 concurrent clients spread over them, with a budget that runs
// out mid-test: what the upstream billed (its own token counts × prices)
// stays within the budget, and the shared ledger, the answers' cost headers
// and the upstream's bill agree to the nano-dollar.
func TestReplicasOnRedisNeverOverspend(t *testing.T) {
	rs := redistest.Start(t)
	testNeverOverspend(t, rs.Addr, rs.Client(t))
}

// TestReplicasOnClusterNeverOverspend is the same on a real three-master
// Redis Cluster, where the cache's keys and the ledgers spread over the
// nodes.
func TestReplicasOnClusterNeverOverspend(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	testNeverOverspend(t, strings.Join(cl.Addrs, ","), cl.Client(t))
}

func testNeverOverspend(t *testing.T, redisAddrs string, client redis.UniversalClient) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const budgetUSD = "0.002"
	var replicas []*child
	var key string
	for range 3 {
		var path string
		path, key = redisConfig(t, up.URL(), redisAddrs, budgetUSD)
		replicas = append(replicas, startStint(t, nil, "serve", "--config", path))
	}
	const clients = 64
	var (
		mu          sync.Mutex
		cost        int64
		ok, refused int
		wg          sync.WaitGroup
	)
	for i := range clients {
		wg.Go(func() {
			body := fmt.Sprintf(`{"model":"quill-small","prompt":"pallet %d of oat crates for the north depot","temperature":0,"max_tokens":12}`, i)
			resp, b := post(t, replicas[i%len(replicas)], key, body)
			mu.Lock()
			defer mu.Unlock()
			switch resp.StatusCode {
			case http.StatusOK:
				ok++
				cost += usdNanos(t, resp.Header.Get("Stint-Cost-Usd"))
			case http.StatusPaymentRequired:
				refused++
			default:
				assert.Failf(t, "neither 200 nor 402", "status %d: %s", resp.StatusCode, b)
			}
		})
	}
	wg.Wait()
	require.Falsef(t, ok == 0 || refused == 0, "%d answered, %d refused: the budget should run out mid-test", ok, refused)
	billed := billedNanos(up.Billed())
	limit := usdNanos(t, budgetUSD)
	assert.Falsef(t, billed > limit, "the upstream billed %d nano-USD, over the %d budget", billed, limit)
	got := up.Calls().Completions
	assert.Equal(t, ok, got, "%d upstream calls for %d answers: a refused call reached the upstream", got, ok)
	ledger := redisledger.New(client, redisledger.Options{})
	b, err := ledger.Balance(context.Background(), time.Now(), budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Falsef(t, int64(b.Spent) != billed || cost != billed || b.Held != 0, "ledger spent %d, headers %d, upstream billed %d, held %d: all must agree exactly, nothing held",
		b.Spent, cost, billed, b.Held)
}

// TestDeadRedisFailsClosedAndRecovers stops the Redis that holds the
// budgets: a miss is refused with 503 and never forwarded, a cache hit is
// still served (the cache is in the replica's own file here, cache: false),
// and once Redis is back the same process forwards again without a restart.
func TestDeadRedisFailsClosedAndRecovers(t *testing.T) {
	rs := redistest.Start(t)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	path, key := redisConfigWith(t, up.URL(), rs.Addr, "1.00", "    cache: false\n")
	c := startStint(t, nil, "serve", "--config", path)
	cached := greedyBody(1)
	resp, b := post(t, c, key, cached)
	require.Equal(t, http.StatusOK, resp.StatusCode, "first call: %d %s", resp.StatusCode, b)
	before := up.Calls().Completions

	rs.Stop()
	resp, b = post(t, c, key, greedyBody(2))
	var e struct {
		Error struct {
			Code    string `json:"code"`
			Message string `json:"message"`
		} `json:"error"`
	}
	assert.Falsef(t, resp.StatusCode != http.StatusServiceUnavailable || json.Unmarshal(b, &e) != nil || e.Error.Code != "spend_control_unavailable", "miss with Redis down: %d %s, want 503 spend_control_unavailable", resp.StatusCode, b)
	resp, b = post(t, c, key, cached)
	assert.Falsef(t, resp.StatusCode != http.StatusOK || cacheOutcome(resp.Header) != "hit", "hit with Redis down: %d %q %s, want 200 hit", resp.StatusCode, cacheOutcome(resp.Header), b)
	got := up.Calls().Completions
	assert.Equal(t, before, got, "upstream calls went from %d to %d with the budget store down: nothing may be forwarded unbudgeted", before, got)

	rs.Restart(t)
	resp, b = post(t, c, key, greedyBody(3))
	assert.Equal(t, http.StatusOK, resp.StatusCode, "after Redis came back: %d %s, want 200 without a restart", resp.StatusCode, b)
}

// runCLI runs a stint command in-process and returns its output.
func runCLI(t *testing.T, args ...string) (string, error) {
	t.Helper()
	cmd := newRootCmd()
	var out strings.Builder
	cmd.SetOut(&out)
	cmd.SetErr(&out)
	cmd.SetArgs(args)
	err := cmd.Execute()
	return out.String(), err
}

// TestBudgetSetThroughOneReplicaHoldsOnAll lowers the team's budget with
// `stint budget set` on one replica; the other replica, sharing the Redis,
// refuses the team's next miss, and `stint statement --proxy` reports the
// spend both replicas made.
func TestBudgetSetThroughOneReplicaHoldsOnAll(t *testing.T) {
	rs := redistest.Start(t)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	pathA, key := redisConfig(t, up.URL(), rs.Addr, "1.00")
	pathB, _ := redisConfig(t, up.URL(), rs.Addr, "1.00") // each replica its own cache file
	a := startStint(t, nil, "serve", "--config", pathA)
	b := startStint(t, nil, "serve", "--config", pathB)
	var cost int64
	for i, c := range []*child{a, b} {
		resp, body := post(t, c, key, greedyBody(10+i))
		require.Equal(t, http.StatusOK, resp.StatusCode, "call on replica %d: %d %s", i, resp.StatusCode, body)
		cost += usdNanos(t, resp.Header.Get("Stint-Cost-Usd"))
	}
	t.Setenv(adminKeyEnv, replicaAdminKey)
	out, err := runCLI(t, "statement", "--proxy", "http://"+b.addr, "--json")
	require.NoError(t, err, "stint statement --proxy: %v\n%s", err, out)
	var rep statement
	err = json.Unmarshal([]byte(out), &rep)
	require.NoError(t, err, "spend JSON %s: %v", out, err)
	assert.Falsef(t, rep.Total.UpstreamCalls != 2 || usdNanos(t, rep.Total.SpentUSD) != cost, "spend via the proxy %+v, want 2 upstream calls costing %d nano-USD", rep.Total, cost)

	out, err = runCLI(t, "budget", "set", "--proxy", "http://"+a.addr, "--team", "lab", "--usd", "0.000001", "--per", "total")
	require.Falsef(t, err != nil || !strings.Contains(out, "0.000001"), "stint budget set: %v\n%s", err, out)
	// Replica b rereads budgets set elsewhere within a second; poll for
	// its refusal (bounded), asserting no timing.
	before := up.Calls().Completions
	deadline := time.Now().Add(20 * time.Second)
	for i := 0; ; i++ {
		resp, body := post(t, b, key, greedyBody(100+i))
		if resp.StatusCode == http.StatusPaymentRequired {
			break
		}
		require.Falsef(t, resp.StatusCode != http.StatusOK || time.Now().After(deadline), "replica b after the budget was lowered: %d %s", resp.StatusCode, body)
		before++ // admitted before the change reached b
		time.Sleep(100 * time.Millisecond)
	}
	got := up.Calls().Completions
	assert.Equal(t, before, got, "upstream calls %d, want %d: the refused call was forwarded", got, before)
	_, err = runCLI(t, "budget", "set", "--proxy", "http://"+a.addr, "--team", "nobody", "--usd", "1")
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "no team"), "budget for an unknown team: %v, want a clear refusal", err)
	t.Setenv(adminKeyEnv, "not-the-admin-key")
	_, err = runCLI(t, "budget", "show", "--proxy", "http://"+a.addr)
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "401"), "budget show with a wrong key: %v, want 401", err)
}

// TestOutageAllowanceCarriesSpendOver stops Redis under a proxy that has
// an outage allowance: misses go on within the allowance and are refused
// (503) past it; when Redis is back, the proxy carries what it spent over,
// so the shared ledger holds every charge the answers' headers reported.
func TestOutageAllowanceCarriesSpendOver(t *testing.T) {
	rs := redistest.Start(t)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	// 6 output tokens at 6 USD per million plus a short prompt at 2 is
	// about 0.00005 USD a call (hand-worked), so 0.0002 USD lasts a few
	// calls; the 10 s lease makes the sweep (which carries over) run
	// every second.
	path, key := redisConfig(t, up.URL(), rs.Addr, "1.00", "budget:\n  lease: 10s\n  outage_allowance: {usd: 0.0002, per: day}\n")
	c := startStint(t, nil, "serve", "--config", path)
	rs.Stop()
	var spent int64
	var ok, refused int
	for i := range 12 {
		resp, body := post(t, c, key, greedyBody(200+i))
		switch resp.StatusCode {
		case http.StatusOK:
			ok++
			spent += usdNanos(t, resp.Header.Get("Stint-Cost-Usd"))
		case http.StatusServiceUnavailable:
			refused++
		default:
			require.FailNowf(t, "neither 200 nor 503", "call %d during the outage: %d %s", i, resp.StatusCode, body)
		}
	}
	require.Falsef(t, ok == 0 || refused == 0, "%d admitted, %d refused during the outage: want the allowance to admit some and run out", ok, refused)
	billed := billedNanos(up.Billed())
	assert.Equal(t, spent, billed, "upstream billed %d, headers say %d", billed, spent)
	rs.Restart(t) // empty: only what the proxy carries over will be there
	ledger := redisledger.New(rs.Client(t), redisledger.Options{})
	deadline := time.Now().Add(30 * time.Second)
	for {
		b, err := ledger.Balance(context.Background(), time.Now(), budget.Scope{Team: "lab"}, budget.Total)
		if err == nil && int64(b.Spent) == spent {
			break
		}
		require.Falsef(t, time.Now().After(deadline), "shared ledger shows %+v (%v) after Redis came back, want %d spent carried over", b, err, spent)
		time.Sleep(200 * time.Millisecond)
	}
}
