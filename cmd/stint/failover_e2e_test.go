package main

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// failoverBody is a completions body of its own for each n (a miss the
// first time), about 0.0001 USD at the replica configs' prices.
func failoverBody(n int) string {
	return fmt.Sprintf(`{"model":"quill-small","prompt":"crate %d of rye for the east depot","temperature":0,"max_tokens":12}`, n)
}

// shot is one request of the load and what came back.
type shot struct {
	replica    int
	start, end time.Time
	status     int
	retryAfter string
	body       []byte
	err        error
}

// TestClusterPrimaryFailover SIGKILLs, under load, the primary that holds
// the team's ledger on a real Redis Cluster of three primaries with a
// replica each (cluster-node-timeout 1 s), behind three stint serve
// processes, while calls admitted before the kill are still at the
// upstream. It checks that:
//
//   - every replica answers again without a restart once the replica has
//     taken over (the recovery time is measured and logged, not asserted);
//     until then misses get 503 with Retry-After, never 402;
//   - the holds of the calls cut off by the failover are released, not left
//     to run out their lease (10 minutes here): nothing stays held, the
//     ledger's spend is exactly what the upstream billed, and nothing was
//     charged as an expired hold;
//   - the cache works again: answers stored before the kill (on the failed
//     primary's replica too) and after it are hits on every replica;
//   - and once the budget runs out, the upstream billed no more than it,
//     and the refusal comes only when less than one call is left.
func TestClusterPrimaryFailover(t *testing.T) {
	cl := redistest.StartClusterWith(t, redistest.ClusterOptions{Masters: 3, Replicas: 1, NodeTimeout: time.Second})
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const budgetUSD = "0.02"
	var rs []*child
	var key string
	for range 3 {
		var path string
		path, key = redisConfigWith(t, up.URL(), strings.Join(cl.Addrs, ","), budgetUSD, "", "budget:\n  lease: 10m\n")
		rs = append(rs, startStint(t, nil, "serve", "--config", path))
	}
	auth := []string{"Authorization", "Bearer " + key}
	const deadline = 10 * time.Second

	// Answers cached before the kill, all through replica 0.
	const warm = 12
	for i := range warm {
		g := call(rs[0], deadline, failoverBody(i), auth...)
		require.NoError(t, g.err)
		require.Equal(t, http.StatusOK, g.status, "warm-up call %d: %s", i, g.body)
	}

	// Calls admitted (their holds reserved) and at the upstream when the
	// primary dies: they finish, and settle, after it is gone.
	const cut = 6
	up.Block()
	cutoff := make([]answer, cut)
	var inflight sync.WaitGroup
	for i := range cut {
		inflight.Go(func() { cutoff[i] = call(rs[i%3], 4*deadline, failoverBody(1000+i), auth...) })
	}
	ctx, cancel := context.WithTimeout(context.Background(), deadline)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, cut))
	// `stint budget show` says what is held, and until when at the latest.
	t.Setenv(adminKeyEnv, replicaAdminKey)
	assert.Equal(t, []string{"lab", "total", budgetUSD, strconv.Itoa(cut)}, showLab(t, rs[1]), "budget show while the calls are at the upstream")

	primary := cl.MasterOf(t, "{lab}") // the slot of the team's ledger keys
	killed := time.Now()
	primary.Stop()
	up.Release()

	// Load: 8 clients, each sending calls of its own round the replicas.
	var (
		mu    sync.Mutex
		shots []shot
		stop  = make(chan struct{})
		load  sync.WaitGroup
	)
	for w := range 8 {
		load.Go(func() {
			for i := 0; ; i++ {
				select {
				case <-stop:
					return
				default:
				}
				r := (w + i) % 3
				s := shot{replica: r, start: time.Now()}
				g := call(rs[r], deadline, failoverBody(10000+w*10000+i), auth...)
				s.end, s.status, s.body, s.err = time.Now(), g.status, g.body, g.err
				if g.header != nil {
					s.retryAfter = g.header.Get("Retry-After")
				}
				mu.Lock()
				shots = append(shots, s)
				mu.Unlock()
				time.Sleep(10 * time.Millisecond) // pacing of one client
			}
		})
	}

	cl.AwaitHealthy(t)
	healthy := time.Now()
	// Recovered: every replica has answered a miss sent after the kill.
	recovered := make([]time.Time, len(rs))
	giveUp := time.Now().Add(60 * time.Second)
	for {
		mu.Lock()
		for _, s := range shots {
			if s.status == http.StatusOK && recovered[s.replica].IsZero() {
				recovered[s.replica] = s.end
			}
		}
		mu.Unlock()
		done := true
		for _, at := range recovered {
			done = done && !at.IsZero()
		}
		if done {
			break
		}
		if time.Now().After(giveUp) {
			close(stop)
			load.Wait()
			require.FailNowf(t, "replicas did not recover", "a minute after the kill, replicas answered again at %v (zero: never); the last answers:\n%s", recovered, lastShots(shots, 6))
		}
		time.Sleep(20 * time.Millisecond) // polling interval
	}
	close(stop)
	load.Wait()
	inflight.Wait()

	last := recovered[0]
	for _, at := range recovered {
		if at.After(last) {
			last = at
		}
	}
	t.Logf("failover: the cluster was healthy %.2fs after the primary's SIGKILL; the proxy replicas answered again after %.2fs, %.2fs and %.2fs (the last %.2fs after the cluster was healthy); %d calls during the failover",
		healthy.Sub(killed).Seconds(), recovered[0].Sub(killed).Seconds(), recovered[1].Sub(killed).Seconds(),
		recovered[2].Sub(killed).Seconds(), last.Sub(healthy).Seconds(), len(shots))

	for i, g := range cutoff {
		assert.NoError(t, g.err, "call %d cut off by the failover", i)
		assert.Equal(t, http.StatusOK, g.status, "call %d cut off by the failover (its upstream call was made): %s", i, g.body)
	}
	var unavailable, noRetryAfter int
	for _, s := range shots {
		switch {
		case s.err != nil:
			assert.NoErrorf(t, s.err, "call to replica %d during the failover", s.replica)
		case s.status == http.StatusServiceUnavailable:
			unavailable++
			if s.retryAfter == "" {
				noRetryAfter++
			}
		case s.status != http.StatusOK:
			assert.Failf(t, "neither 200 nor 503", "call to replica %d during the failover: %d %s, want 200 or 503", s.replica, s.status, s.body)
		}
	}
	assert.Zero(t, noRetryAfter, "503s during the failover without Retry-After")
	t.Logf("failover: %d of the %d calls during it were answered 503", unavailable, len(shots))

	// A client made after the failover, so it starts with the new map.
	cc := cl.Client(t)
	ledger := redisledger.New(cc, redisledger.Options{})
	bg := context.Background()
	var bal budget.Balance
	giveUp = time.Now().Add(30 * time.Second)
	for {
		var err error
		bal, err = ledger.Balance(bg, time.Now(), budget.Scope{Team: "lab"}, budget.Total)
		require.NoError(t, err)
		if bal.Held == 0 || time.Now().After(giveUp) {
			break
		}
		time.Sleep(50 * time.Millisecond) // polling interval
	}
	billed := billedNanos(up.Billed())
	assert.Zero(t, bal.Held, "nano-USD still held 30 s after the load stopped (the lease is 10 minutes): holds of calls cut off by the failover were stranded")
	assert.Equal(t, billed, int64(bal.Spent), "the ledger's spend must be exactly what the upstream billed: nothing charged for money not spent")
	expired := 0
	require.NoError(t, ledger.Scan(bg, time.Time{}, "lab", func(e budget.Entry) error {
		if e.Outcome == budget.Expired {
			expired++
		}
		return nil
	}))
	assert.Zero(t, expired, "holds charged in full as expired")
	assert.Equal(t, []string{"lab", "total", budgetUSD, "0"}, showLab(t, rs[2]), "budget show after the failover")

	// The cache: fresh answers stored through replica 0 are hits on the
	// other two, polled round by round (a node's cooldown can outlast the
	// failover by a tenth of a second); then what was stored before the
	// kill is a hit on the replicas that never saw it.
	promoted := cl.MasterOf(t, "{lab}")
	require.NotEqual(t, primary.Addr, promoted.Addr)
	entriesBefore := cacheEntries(t, promoted.Addr)
	const fresh = 12
	for round := 0; ; round++ {
		require.Less(t, round, 20, "fresh answers stored through replica 0 are still not hits on the others")
		for i := range fresh {
			g := call(rs[0], deadline, failoverBody(500000+round*100+i), auth...)
			require.NoError(t, g.err)
			require.Equal(t, http.StatusOK, g.status, "%s", g.body)
		}
		stored := up.Calls().Completions
		for i := range fresh {
			for _, r := range rs[1:] {
				g := call(r, deadline, failoverBody(500000+round*100+i), auth...)
				require.NoError(t, g.err)
				require.Equal(t, http.StatusOK, g.status, "%s", g.body)
			}
		}
		if up.Calls().Completions == stored {
			t.Logf("failover: the cache served every replica again %.2fs after the kill (round %d of fresh answers)", time.Since(killed).Seconds(), round)
			break
		}
	}
	assert.Greater(t, cacheEntries(t, promoted.Addr), entriesBefore, "none of the answers stored after the failover is on the promoted replica")
	calls := up.Calls().Completions
	for i := range warm {
		for _, r := range rs[1:] {
			g := call(r, deadline, failoverBody(i), auth...)
			require.NoError(t, g.err)
			require.Equal(t, http.StatusOK, g.status, "%s", g.body)
		}
	}
	assert.Equal(t, calls, up.Calls().Completions, "answers cached before the failover went upstream again")

	// Spend the rest of the budget, one call at a time, so that nothing
	// else is held when the refusal comes.
	limit := usdNanos(t, budgetUSD)
	var requested int64
	for i := 0; ; i++ {
		g := call(rs[i%3], deadline, failoverBody(900000+i), auth...)
		require.NoError(t, g.err)
		if g.status == http.StatusPaymentRequired {
			requested = couldCost(t, g.body)
			break
		}
		require.Equal(t, http.StatusOK, g.status, "%s", g.body)
		require.Less(t, i, 1000, "the budget never ran out")
	}
	billed = billedNanos(up.Billed())
	assert.LessOrEqual(t, billed, limit, "the upstream billed more than the budget")
	assert.Less(t, limit-billed, requested, "refused with %d nano-USD of the budget unspent, more than the call's worst case %d", limit-billed, requested)
}

// showLab runs `stint budget show` against c and returns the team lab's
// team, period, budget and number of holds; a team with holds must have a
// HELD UNTIL time no later than its lease (10 minutes) from now.
func showLab(t *testing.T, c *child) []string {
	t.Helper()
	out, err := runCLI(t, "budget", "show", "--proxy", "http://"+c.addr)
	require.NoError(t, err, "%s", out)
	for _, line := range strings.Split(out, "\n") {
		f := strings.Fields(line)
		if len(f) != 8 || f[0] != "lab" {
			continue
		}
		if f[6] != "0" {
			until, err := time.Parse(time.RFC3339, f[7])
			require.NoError(t, err, "HELD UNTIL in %q", line)
			assert.False(t, until.After(time.Now().Add(10*time.Minute)), "held until %v, past the lease", until)
		} else {
			assert.Equal(t, "-", f[7], "HELD UNTIL with nothing held")
		}
		return []string{f[0], f[1], f[2], f[6]}
	}
	require.FailNowf(t, "no row of team lab", "no row of team lab in:\n%s", out)
	return nil
}

// couldCost reads the worst case of a refused call from a 402's message.
func couldCost(t *testing.T, body []byte) int64 {
	t.Helper()
	var e struct {
		Error struct {
			Message string `json:"message"`
		} `json:"error"`
	}
	require.NoError(t, json.Unmarshal(body, &e))
	m := regexp.MustCompile(`could cost up to ([0-9.]+) USD`).FindStringSubmatch(e.Error.Message)
	require.NotNil(t, m, "402 message %q", e.Error.Message)
	return usdNanos(t, m[1])
}

// cacheEntries counts the cached answers stored on the node at addr.
func cacheEntries(t *testing.T, addr string) int {
	t.Helper()
	c := redis.NewClient(&redis.Options{Addr: addr})
	defer c.Close()
	n := 0
	iter := c.Scan(context.Background(), 0, "stint:cache:*:v", 1000).Iterator()
	for iter.Next(context.Background()) {
		n++
	}
	require.NoError(t, iter.Err())
	return n
}

// lastShots renders the last n shots for a failure message.
func lastShots(shots []shot, n int) string {
	var b strings.Builder
	for _, s := range shots[max(len(shots)-n, 0):] {
		fmt.Fprintf(&b, "replica %d: %d %v %s\n", s.replica, s.status, s.err, s.body)
	}
	return b.String()
}
