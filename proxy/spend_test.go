package proxy_test

import (
	"context"
	"crypto/sha256"
	"encoding/json"
	"fmt"
	"net/http"
	"path/filepath"
	"strconv"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/cache/boltgroup"
	"github.com/stintlab/stint/proxy"
)

// Prices for the fake's models in these tests (invented): USD per million
// tokens.
const (
	testInputPrice  = 2.0
	testOutputPrice = 6.0
)

// spendRig is a rig whose proxy runs under a real guard on a real bbolt
// ledger.
type spendRig struct {
	*rig
	ledger *boltledger.Ledger
}

func newSpendRig(t *testing.T, policy guard.TeamPolicy, extra ...func(*guard.Config)) *spendRig {
	t.Helper()
	return newSpendRigWith(t, policy, nil, extra...)
}

// newSpendRigWith is newSpendRig with more proxy options set by opt (nil:
// none).
func newSpendRigWith(t *testing.T, policy guard.TeamPolicy, opt func(*proxy.Options), extra ...func(*guard.Config)) *spendRig {
	t.Helper()
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "ledger.db"), 0o600, nil)
	require.NoError(t, err)
	t.Cleanup(func() { _ = db.Close() })
	ledger, err := boltledger.New(db, boltledger.Options{Update: boltgroup.New(db).Update})
	require.NoError(t, err)
	cfg := guard.Config{
		Prices: budget.PriceTable{Models: map[string]budget.Price{model: {Input: testInputPrice, Output: testOutputPrice}}},
		Teams:  map[string]guard.TeamPolicy{"lab": policy, "kiln": {}},
		// Budgets set at run time live beside the sums they cap.
		Overrides: ledger,
	}
	for _, fn := range extra {
		fn(&cfg)
	}
	g, err := guard.New(cfg, ledger, ledger, &ratelimit.Local{}, nil)
	require.NoError(t, err)
	r := newRig(t, withTeams(teamWithKey("lab", "lab-key"), teamWithKey("kiln", "kiln-key")), func(o *proxy.Options) {
		o.Spend = g
		o.AdminKeyHashes = [][sha256.Size]byte{sha256.Sum256([]byte(adminKey))}
		if opt != nil {
			opt(o)
		}
	})
	r.key = "lab-key"
	return &spendRig{rig: r, ledger: ledger}
}

// adminKey may use the spend rig's admin endpoints.
const adminKey = "admin-key-of-the-depot"

func usdCap(t *testing.T, usd float64) *budget.Cap {
	t.Helper()
	n, err := budget.FromUSD(usd)
	require.NoError(t, err)
	return &budget.Cap{Limit: n, Period: budget.Total}
}

// billedNanos is what the fake upstream's own usage costs at the test prices
// (hand-worked: tokens × USD per million × 1e9 nanos / 1e6 = tokens × price × 1000).
func billedNanos(promptTokens, completionTokens int) int64 {
	return int64(promptTokens)*int64(testInputPrice*1000) + int64(completionTokens)*int64(testOutputPrice*1000)
}

func headerNanos(t *testing.T, h http.Header, name string) int64 {
	t.Helper()
	v := h.Get(name)
	require.NotEqual(t, "", v, "no %s header", name)
	f, err := strconv.ParseFloat(v, 64)
	require.NoError(t, err, "%s = %q", name, v)
	n, err := budget.FromUSD(f)
	require.NoError(t, err)
	return int64(n)
}

func TestSpendHeadersOnMissAndHit(t *testing.T) {
	r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, 1)})
	miss := r.complete(greedy("price of a crate of honey"))
	require.Equal(t, http.StatusOK, miss.status, "miss: %d %s", miss.status, miss.body)
	u := decodeCompletion(t, miss.body).Usage
	want := billedNanos(u.PromptTokens, u.CompletionTokens)
	got := headerNanos(t, miss.header, proxy.HeaderCost)
	assert.Equal(t, want, got, "miss %s = %d nanos, want %d (usage %+v at the test prices)", proxy.HeaderCost, got, want, u)
	got = headerNanos(t, miss.header, proxy.HeaderBudgetLeft)
	assert.Equal(t, int64(budget.NanosPerUSD)-want, got, "budget left %d nanos, want %d", got, int64(budget.NanosPerUSD)-want)
	hit := r.complete(greedy("price of a crate of honey"))
	require.Equal(t, proxy.OutcomeHit, hit.cache(), "second call: %q", hit.cache())
	got = headerNanos(t, hit.header, proxy.HeaderCost)
	assert.Equal(t, int64(0), got, "hit cost %d, want 0", got)
	got = headerNanos(t, hit.header, proxy.HeaderSaved)
	assert.Equal(t, want, got, "hit saved %d, want %d (what the call costs now)", got, want)
	require.NoError(t, r.proxy.Close(context.Background()))
	b, err := r.ledger.Balance(context.Background(), time.Now(), budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Equal(t, want, int64(b.Spent), "ledger spent %d held %d, want %d and 0: a hit must not touch it", b.Spent, b.Held, want)
	assert.Equal(t, budget.Nanos(0), b.Held, "ledger spent %d held %d, want %d and 0: a hit must not touch it", b.Spent, b.Held, want)
	rows, err := budget.Report(context.Background(), r.ledger, budget.Query{By: budget.ByTeam})
	require.NoError(t, err, "report: %v %+v", err, rows)
	require.Len(t, rows, 1, "report: %v %+v", err, rows)
	assert.False(t, rows[0].Requests != 2 || rows[0].UpstreamCalls != 1 || int64(rows[0].Saved) != want, "journal row %+v, want 2 requests, 1 upstream call, saved %d", rows[0], want)
}

func TestBudgetRunsOutWithoutOverspend(t *testing.T) {
	const budgetUSD = 0.002
	r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, budgetUSD)})
	const clients = 64
	var (
		mu           sync.Mutex
		billed, cost int64
		ok, refused  int
	)
	var wg sync.WaitGroup
	for i := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			got := r.complete(greedy(fmt.Sprintf("crate %d of clover honey for the market", i), "max_tokens", 12))
			mu.Lock()
			defer mu.Unlock()
			switch got.status {
			case http.StatusOK:
				ok++
				u := decodeCompletion(t, got.body).Usage
				billed += billedNanos(u.PromptTokens, u.CompletionTokens)
				cost += headerNanos(t, got.header, proxy.HeaderCost)
			case http.StatusPaymentRequired:
				refused++
				var e struct {
					Error struct {
						Code string `json:"code"`
					} `json:"error"`
				}
				assert.NoError(t, json.Unmarshal(got.body, &e), "402 body %s", got.body)
				assert.Equal(t, "budget_exhausted", e.Error.Code, "402 body %s", got.body)
			default:
				assert.Failf(t, "unexpected status", "status %d: %s", got.status, got.body)
			}
		}()
	}
	wg.Wait()
	limit, _ := budget.FromUSD(budgetUSD)
	require.NotEqual(t, 0, ok, "%d answered, %d refused: the budget should run out mid-test", ok, refused)
	require.NotEqual(t, 0, refused, "%d answered, %d refused: the budget should run out mid-test", ok, refused)
	assert.LessOrEqual(t, billed, int64(limit), "the upstream billed %d nanos, over the %d budget", billed, limit)
	assert.Equal(t, ok, r.upstreamGenerations(), "upstream calls vs answered: a refused call reached the upstream")
	b, err := r.ledger.Balance(context.Background(), time.Now(), budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Equal(t, billed, int64(b.Spent), "ledger spent %d, headers %d, upstream billed %d, held %d: all three must agree exactly, nothing held", b.Spent, cost, billed, b.Held)
	assert.Equal(t, billed, cost, "ledger spent %d, headers %d, upstream billed %d, held %d: all three must agree exactly, nothing held", b.Spent, cost, billed, b.Held)
	assert.Equal(t, budget.Nanos(0), b.Held, "ledger spent %d, headers %d, upstream billed %d, held %d: all three must agree exactly, nothing held", b.Spent, cost, billed, b.Held)
}

func TestSpendRefusals(t *testing.T) {
	t.Run("rate limit", func(t *testing.T) {
		r := newSpendRig(t, guard.TeamPolicy{Limits: guard.Limits{RequestsPerMinute: 1}}, func(c *guard.Config) { c.MaxWait = -1 })
		first := r.complete(greedy("first"))
		require.Equal(t, http.StatusOK, first.status, "first: %s", first.body)
		got := r.complete(greedy("second"))
		require.Equal(t, http.StatusTooManyRequests, got.status, "second: %d %s, want 429", got.status, got.body)
		// RFC 9110 §10.2.3: delay-seconds, a whole number.
		retryAfter, raErr := strconv.Atoi(got.header.Get("Retry-After"))
		assert.NoError(t, raErr, "Retry-After %q", got.header.Get("Retry-After"))
		assert.GreaterOrEqual(t, retryAfter, 1, "Retry-After %q", got.header.Get("Retry-After"))
		hit := r.complete(greedy("first"))
		assert.Equal(t, http.StatusOK, hit.status, "a cache hit under the rate limit: %d %q, want 200 hit (hits are not limited)", hit.status, hit.cache())
		assert.Equal(t, proxy.OutcomeHit, hit.cache(), "a cache hit under the rate limit: %d %q, want 200 hit (hits are not limited)", hit.status, hit.cache())
	})
	t.Run("unpriced model", func(t *testing.T) {
		r := newSpendRig(t, guard.TeamPolicy{})
		got := r.complete(map[string]any{"model": "quill-large", "prompt": "x", "temperature": 0})
		require.Equal(t, http.StatusBadRequest, got.status, "unpriced model: %d %s, upstream calls %d", got.status, got.body, r.upstreamGenerations())
		require.Equal(t, 0, r.upstreamGenerations(), "unpriced model: %d %s, upstream calls %d", got.status, got.body, r.upstreamGenerations())
	})
	t.Run("bypass is settled from usage", func(t *testing.T) {
		r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, 1)})
		for _, stream := range []bool{false, true} {
			body := greedy("sampled honey", "temperature", 0.9, "stream", stream)
			if stream {
				body["stream_options"] = map[string]any{"include_usage": false}
			}
			got := r.complete(body)
			require.Equal(t, http.StatusOK, got.status, "stream=%v: %d %q %s", stream, got.status, got.cache(), got.body)
			require.Equal(t, proxy.OutcomeBypass, got.cache(), "stream=%v: %d %q %s", stream, got.status, got.cache(), got.body)
			if stream {
				_, usageChunk := streamedText(t, false, events(t, got.body))
				assert.Nil(t, usageChunk, "the client did not ask for usage but got a usage chunk")
			}
		}
		require.NoError(t, r.proxy.Close(context.Background()))
		b, err := r.ledger.Balance(context.Background(), time.Now(), budget.Scope{Team: "lab"}, budget.Total)
		if assert.NoError(t, err, "after two bypassed calls") {
			assert.Greater(t, b.Spent, budget.Nanos(0), "after two bypassed calls: spent")
			assert.Equal(t, budget.Nanos(0), b.Held, "after two bypassed calls: held")
		}
	})
}
