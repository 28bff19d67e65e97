package guard_test

import (
	"context"
	"errors"
	"math/rand/v2"
	"path/filepath"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/ratelimit/redisrate"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/budget/tokens"
	"github.com/stintlab/stint/internal/redistest"
)

// The invented scenario: a glossary team tunes prompts against
// "demo-model" (cl100k_base) and "plain-model" (no known tokenizer).
const (
	inPerToken  = 500  // demo-model input: 0.50 USD per million tokens = 500 nano-USD per token
	outPerToken = 1500 // demo-model output: 1.50 USD per million tokens
)

func f64(v float64) *float64 { return &v }

// prices has demo-model, plain-model (same price), a model whose cached
// input costs more than input, and a default price of 1.00/2.00.
func prices() budget.PriceTable {
	return budget.PriceTable{
		Models: map[string]budget.Price{
			"demo-model":  {Input: 0.50, Output: 1.50, CachedInput: f64(0.25)},
			"plain-model": {Input: 0.50, Output: 1.50},
			"cachey":      {Input: 1.00, Output: 0, CachedInput: f64(2.00)},
		},
		Default: &budget.Price{Input: 1.00, Output: 2.00},
	}
}

func baseConfig() guard.Config {
	return guard.Config{
		Prices:     prices(),
		Encodings:  map[string]tokens.Encoding{"demo-model": tokens.Cl100kBase},
		OutputCaps: map[string]int64{"plain-model": 50},
		MaxWait:    -1,
	}
}

// clock is a settable clock.
type clock struct {
	mu sync.Mutex // guards t
	t  time.Time
}

func newClock() *clock { return &clock{t: time.Date(2026, 12, 1, 9, 0, 0, 0, time.UTC)} }

func (c *clock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *clock) Add(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
}

// backend is a ledger and journal under test.
type backend interface {
	budget.Ledger
	budget.Journal
}

// openBolt opens a real embedded ledger in a temporary bbolt file.
func openBolt(tb testing.TB) *boltledger.Ledger {
	tb.Helper()
	db, err := bbolt.Open(filepath.Join(tb.TempDir(), "stint.db"), 0o600, nil)
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { db.Close() })
	l, err := boltledger.New(db, boltledger.Options{Batch: true})
	if err != nil {
		tb.Fatal(err)
	}
	return l
}

// newGuard makes a Guard on a fresh bbolt file with a local limiter.
func newGuard(tb testing.TB, cfg guard.Config, c *clock) (*guard.Guard, backend) {
	tb.Helper()
	l := openBolt(tb)
	g, err := guard.New(cfg, l, l, &ratelimit.Local{}, c.Now)
	if err != nil {
		tb.Fatal(err)
	}
	return g, l
}

func usd(tb testing.TB, v float64) budget.Nanos {
	tb.Helper()
	n, err := budget.FromUSD(v)
	if err != nil {
		tb.Fatal(err)
	}
	return n
}

func helloCall() guard.Call {
	return guard.Call{Team: "glossary", KeyID: "0123456789ab", Model: "demo-model", Upstream: "main",
		Prompts: []string{"hello world"}, MaxTokens: 100, N: 2}
}

func balance(tb testing.TB, l budget.Ledger, now time.Time, s budget.Scope) budget.Balance {
	tb.Helper()
	b, err := l.Balance(context.Background(), now, s, budget.Month)
	if err != nil {
		tb.Fatal(err)
	}
	return b
}

func TestWorstCaseHandWorked(t *testing.T) {
	tests := []struct {
		name       string
		call       guard.Call
		wantPrompt int64
		wantOut    int64
		wantCost   budget.Nanos
		wantExact  bool
	}{
		{
			// "hello world" is 2 cl100k tokens, [15339, 1917] (the ids of
			// tiktoken-go/tokenizer's own test, which budget/tokens
			// TestCheckValues holds the codec to). hand-worked: out 100×2×1 =
			// 200; 2×500 + 200×1500 = 301,000.
			name: "cl100k prompt", call: helloCall(),
			wantPrompt: 2, wantOut: 200, wantCost: 301_000, wantExact: true,
		},
		{
			// hand-worked: UpperBound is UTF-8 bytes + 1 per prompt:
			// (11+1) + (6+1) = 19 ("héllo" is 6 bytes); no max_tokens,
			// so plain-model's cap 50 × n 1 × 2 prompts = 100;
			// 19×500 + 100×1500 = 159,500.
			name:       "upper bound, output cap",
			call:       guard.Call{Team: "glossary", Model: "plain-model", Prompts: []string{"hello world", "héllo"}, MaxTokens: -1},
			wantPrompt: 19, wantOut: 100, wantCost: 159_500,
		},
		{
			// hand-worked: token-id prompts of 3 and 4 ids = 7 tokens;
			// out 10×3×2 = 60; 7×500 + 60×1500 = 93,500.
			name:       "token ids",
			call:       guard.Call{Team: "glossary", Model: "demo-model", PromptTokenIDs: []int{3, 4}, MaxTokens: 10, N: 3},
			wantPrompt: 7, wantOut: 60, wantCost: 93_500, wantExact: true,
		},
		{
			// hand-worked: chat, unknown tokenizer: reply 3 + message 4 +
			// "user" (4+1) + "hello world" (11+1) = 24; default price
			// 1.00/2.00 (1000/2000 per token) and default cap 4096:
			// 24×1000 + 4096×2000 = 8,216,000.
			name: "chat, default price and cap",
			call: guard.Call{Team: "glossary", Model: "unlisted", Endpoint: guard.Chat,
				Messages: []tokens.Message{{Role: "user", Content: "hello world"}}, MaxTokens: -1},
			wantPrompt: 24, wantOut: 4096, wantCost: 8_216_000,
		},
		{
			// hand-worked: cached input (2.00) dearer than input (1.00):
			// the worst case takes 2000 per token; "abcd" is 4+1 = 5
			// tokens; max_tokens 0: 5×2000 = 10,000.
			name:       "cached input dearer",
			call:       guard.Call{Team: "glossary", Model: "cachey", Prompts: []string{"abcd"}, MaxTokens: 0},
			wantPrompt: 5, wantOut: 0, wantCost: 10_000,
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			g, _ := newGuard(t, baseConfig(), newClock())
			tk, err := g.Admit(context.Background(), tt.call)
			require.NoError(t, err)
			est := tk.Estimate()
			assert.Equal(t, tt.wantPrompt, est.PromptTokens, "estimate: prompt tokens")
			assert.Equal(t, tt.wantOut, est.OutputTokens, "estimate: output tokens")
			assert.Equal(t, tt.wantCost, est.Cost, "estimate: cost")
			assert.Equal(t, tt.wantExact, est.Exact, "estimate: exact")
			assert.Equal(t, tt.wantCost, tk.Reserved(), "reserved")
		})
	}
}

func TestBadCalls(t *testing.T) {
	cfg := baseConfig()
	cfg.Prices.Default = nil
	tests := []struct {
		name string
		call guard.Call
		want error
	}{
		{"unknown model", guard.Call{Team: "glossary", Model: "mystery", Prompts: []string{"x"}, MaxTokens: 1}, budget.ErrUnknownModel},
		{"bad team", guard.Call{Team: "a b", Model: "demo-model", Prompts: []string{"x"}, MaxTokens: 1}, guard.ErrBadCall},
		{"negative n", guard.Call{Team: "glossary", Model: "demo-model", Prompts: []string{"x"}, MaxTokens: 1, N: -2}, guard.ErrBadCall},
		{"max_tokens below -1", guard.Call{Team: "glossary", Model: "demo-model", Prompts: []string{"x"}, MaxTokens: -5}, guard.ErrBadCall},
		{"no prompt", guard.Call{Team: "glossary", Model: "demo-model", MaxTokens: 1}, guard.ErrBadCall},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			c := newClock()
			g, l := newGuard(t, cfg, c)
			_, err := g.Admit(context.Background(), tt.call)
			require.ErrorIs(t, err, tt.want, "Admit")
			n, _ := l.Expire(context.Background(), c.Now().Add(24*time.Hour))
			assert.Empty(t, n, "reservations a refused call left")
		})
	}
}

func TestExhaustedReservesNothing(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	limit := usd(t, 0.001) // 1,000,000 nano-USD: three 301,000 calls fit, a fourth does not
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: limit, Period: budget.Month}}}
	g, l := newGuard(t, cfg, c)
	ctx := context.Background()
	for i := range 3 {
		tk, err := g.Admit(ctx, helloCall())
		require.NoError(t, err, "call %d", i)
		left, ok := tk.Left()
		assert.True(t, ok, "call %d: a budget to be left", i)
		assert.Equal(t, limit-budget.Nanos(i+1)*301_000, left, "call %d: left", i)
	}
	_, err := g.Admit(ctx, helloCall())
	var ex *budget.ExhaustedError
	require.ErrorAs(t, err, &ex, "4th Admit")
	assert.Equal(t, budget.Nanos(97_000), ex.Remaining, "exhausted: remaining 1,000,000 − 3×301,000")
	assert.Equal(t, budget.Nanos(301_000), ex.Requested, "exhausted: requested")
	assert.Equal(t, budget.Balance{Held: 903_000}, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}), "balance: the refused call must hold nothing")
	left, has, err := g.Left(ctx, "glossary")
	require.NoError(t, err, "Left")
	assert.True(t, has, "Left: a budget")
	assert.Equal(t, budget.Nanos(97_000), left, "Left")
}

func TestSettleReleasesDifference(t *testing.T) {
	tests := []struct {
		name string
		u    guard.Usage
		// hand-worked costs at demo-model's 500 / 250 (cached) / 1500
		want budget.Nanos
	}{
		{"plain", guard.Usage{PromptTokens: 2, CompletionTokens: 37}, 2*inPerToken + 37*outPerToken}, // 56,500
		{"cached", guard.Usage{PromptTokens: 2, CachedPromptTokens: 1, CompletionTokens: 10}, 500 + 250 + 10*outPerToken},
		{"nothing generated", guard.Usage{PromptTokens: 2}, 1000},
		{"full worst case", guard.Usage{PromptTokens: 2, CompletionTokens: 200}, 301_000},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			c := newClock()
			cfg := baseConfig()
			limit := usd(t, 1)
			cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: limit, Period: budget.Month}}}
			g, l := newGuard(t, cfg, c)
			ctx := context.Background()
			tk, err := g.Admit(ctx, helloCall())
			require.NoError(t, err)
			c.Add(time.Second)
			ch, err := tk.Settle(ctx, tt.u, budget.Miss)
			require.NoError(t, err)
			assert.Equal(t, tt.want, ch.Cost, "charge: cost")
			assert.True(t, ch.HasBudget, "charge: has a budget")
			assert.Equal(t, limit-tt.want, ch.Remaining, "charge: remaining")
			assert.False(t, ch.Expired, "charge: expired")
			assert.WithinDuration(t, time.Date(2027, 1, 1, 0, 0, 0, 0, time.UTC), ch.Resets, 0, "charge: resets")
			assert.Equal(t, budget.Balance{Spent: tt.want}, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}), "balance")
			_, err = tk.Settle(ctx, tt.u, budget.Miss)
			assert.ErrorIs(t, err, guard.ErrSettled, "second Settle: got")
			rows := report(t, l, budget.ByModel)
			if assert.Len(t, rows, 1, "report") {
				assert.Equal(t, tt.want, rows[0].Spent, "report: spent")
				assert.EqualValues(t, 1, rows[0].UpstreamCalls, "report: upstream calls")
				assert.EqualValues(t, 2, rows[0].InputTokens, "report: input tokens")
				assert.EqualValues(t, tt.u.CompletionTokens, rows[0].OutputTokens, "report: output tokens")
			}
		})
	}
}

func report(tb testing.TB, j budget.Journal, by budget.GroupBy) []budget.Row {
	tb.Helper()
	rows, err := budget.Report(context.Background(), j, budget.Query{By: by})
	if err != nil {
		tb.Fatal(err)
	}
	return rows
}

func TestFail(t *testing.T) {
	tests := []struct {
		billed bool
		want   budget.Nanos
	}{
		{false, 0},
		{true, 301_000}, // the reserved amount
	}
	for _, tt := range tests {
		c := newClock()
		cfg := baseConfig()
		cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
		g, l := newGuard(t, cfg, c)
		ctx := context.Background()
		tk, err := g.Admit(ctx, helloCall())
		require.NoError(t, err)
		ch, err := tk.Fail(ctx, tt.billed)
		require.NoError(t, err, "Fail(billed=%v)", tt.billed)
		assert.Equal(t, tt.want, ch.Cost, "Fail(billed=%v): cost", tt.billed)
		assert.Equal(t, budget.Balance{Spent: tt.want}, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}), "billed=%v: balance", tt.billed)
		rows := report(t, l, budget.ByTeam)
		if assert.Len(t, rows, 1, "billed=%v: report", tt.billed) {
			assert.EqualValues(t, 1, rows[0].UpstreamCalls, "billed=%v: report's upstream calls", tt.billed)
			assert.Equal(t, tt.want, rows[0].Spent, "billed=%v: report's spend", tt.billed)
		}
	}
}

func TestCancelReleasesWithoutJournal(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
	g, l := newGuard(t, cfg, c)
	tk, err := g.Admit(context.Background(), helloCall())
	require.NoError(t, err)
	require.NoError(t, tk.Cancel(context.Background()))
	assert.Equal(t, budget.Balance{}, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}), "balance after Cancel")
	assert.Empty(t, report(t, l, budget.ByTeam), "report after Cancel: nothing journaled")
	_, err = tk.Fail(context.Background(), true)
	assert.ErrorIs(t, err, guard.ErrSettled, "Fail after Cancel: got")
}

func TestSavedDoesNotSpend(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}, Limits: guard.Limits{RequestsPerMinute: 1}}}
	g, l := newGuard(t, cfg, c)
	ctx := context.Background()
	for range 3 { // more hits than the rate limit allows calls: hits are not limited
		saved, err := g.Saved(ctx, helloCall(), guard.Usage{PromptTokens: 2, CompletionTokens: 37})
		require.NoError(t, err, "Saved")
		require.Equal(t, budget.Nanos(56_500), saved, "Saved") // hand-worked: 2×500 + 37×1500
	}
	assert.Equal(t, budget.Balance{}, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}), "balance after hits")
	rows := report(t, l, budget.ByTeam)
	if assert.Len(t, rows, 1, "report") {
		assert.EqualValues(t, 3, rows[0].CacheHits, "report: hits")
		assert.Zero(t, rows[0].UpstreamCalls, "report: upstream calls")
		assert.Equal(t, budget.Nanos(3*56_500), rows[0].Saved, "report: saved")
		assert.Zero(t, rows[0].Spent, "report: spent")
	}
	_, err := g.Admit(ctx, helloCall())
	assert.NoError(t, err, "first real call after hits (hits must not use the rate limit)")
}

func TestRateLimits(t *testing.T) {
	// helloCall's worst case is 2 + 200 = 202 tokens.
	tests := []struct {
		name      string
		team      guard.Limits
		upstream  guard.Limits
		admitted  int
		wantRetry time.Duration // after the admitted calls, at the same instant
	}{
		// x/time/rate with burst 2 and one request per 30 s: the third
		// request at once needs one interval, 30 s.
		{"team rpm", guard.Limits{RequestsPerMinute: 2}, guard.Limits{}, 2, 30 * time.Second},
		// hand-worked: burst 606 tokens admits three calls of 202;
		// the 4th needs 202 tokens at one per Interval = 60 s / 606
		// rounded up to the µs = 99,010 µs: 202 × 99,010 µs.
		{"team tpm", guard.Limits{TokensPerMinute: 606}, guard.Limits{}, 3, 202 * 99_010 * time.Microsecond},
		{"upstream rpm", guard.Limits{}, guard.Limits{RequestsPerMinute: 1}, 1, time.Minute},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			c := newClock()
			cfg := baseConfig()
			cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}, Limits: tt.team}}
			cfg.Upstreams = map[string]guard.Limits{"main": tt.upstream}
			g, l := newGuard(t, cfg, c)
			ctx := context.Background()
			for i := range tt.admitted {
				_, err := g.Admit(ctx, helloCall())
				require.NoError(t, err, "call %d", i)
			}
			_, err := g.Admit(ctx, helloCall())
			var le *ratelimit.LimitedError
			require.ErrorAs(t, err, &le, "call %d", tt.admitted)
			// x/time/rate computes the delay in float seconds; allow a
			// microsecond of rounding.
			assert.InDelta(t, tt.wantRetry, le.RetryAfter, float64(time.Microsecond), "retry after")
			want := budget.Nanos(tt.admitted) * 301_000
			assert.Equal(t, want, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}).Held, "held: the refused call's reservation must be released")
			c.Add(tt.wantRetry)
			_, err = g.Admit(ctx, helloCall())
			assert.NoError(t, err, "after waiting the retry-after")
		})
	}
}

func TestQueueWaitsWithinMaxWait(t *testing.T) {
	// The limiter is asked at the Guard's clock, but the wait is a real
	// timer. A 202-token burst is used up by the first call; a second of
	// 2 tokens waits 2 × 297,030 µs (60 s / 202), under MaxWait.
	c := newClock()
	cfg := baseConfig()
	cfg.MaxWait = time.Second
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Limits: guard.Limits{TokensPerMinute: 202}}}
	g, _ := newGuard(t, cfg, c)
	ctx := context.Background()
	_, err := g.Admit(ctx, helloCall())
	require.NoError(t, err)
	call := helloCall()
	call.MaxTokens = 0 // 2 prompt tokens, no output
	_, err = g.Admit(ctx, call)
	assert.NoError(t, err, "queued call: admitted after waiting")
	big := helloCall()
	big.MaxTokens = 200
	_, err = g.Admit(ctx, big)
	assert.ErrorIs(t, err, guard.ErrTooLarge, "call of 402 tokens under a 202-token limit: got")
}

func TestExpireChargesInFull(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Lease = time.Minute
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
	g, l := newGuard(t, cfg, c)
	ctx := context.Background()
	tk, err := g.Admit(ctx, helloCall())
	require.NoError(t, err)
	c.Add(time.Minute)
	n, err := g.Expire(ctx)
	require.NoError(t, err, "Expire")
	require.Equal(t, 1, n, "Expire")
	assert.Equal(t, budget.Balance{Spent: 301_000}, balance(t, l, c.Now(), budget.Scope{Team: "glossary"}), "balance: the reservation charged in full")
	// The holder comes back late: charged the reserved amount, not
	// twice, and the journal still sums to the ledger.
	ch, err := tk.Settle(ctx, guard.Usage{PromptTokens: 2, CompletionTokens: 5}, budget.Miss)
	require.NoError(t, err, "late Settle")
	assert.True(t, ch.Expired, "late Settle: expired")
	assert.Equal(t, budget.Nanos(301_000), ch.Cost, "late Settle: cost")
	assert.Equal(t, budget.Nanos(301_000), balance(t, l, c.Now(), budget.Scope{Team: "glossary"}).Spent, "spent after late settle")
	rows := report(t, l, budget.ByTeam)
	if assert.Len(t, rows, 1, "report") {
		assert.Equal(t, budget.Nanos(301_000), rows[0].Spent, "report: spent")
		assert.EqualValues(t, 1, rows[0].Requests, "report: requests")
	}
}

func TestRunSweeps(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Lease = time.Minute
	cfg.SweepEvery = time.Millisecond
	l := openBolt(t)
	expired := make(chan struct{}, 1)
	// The journal tells the test when the sweep has journaled the
	// expired reservation.
	j := notifyJournal{Journal: l, appended: expired}
	g, err := guard.New(cfg, l, j, &ratelimit.Local{}, c.Now)
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	_, err = g.Admit(ctx, helloCall())
	require.NoError(t, err)
	c.Add(time.Hour)
	done := make(chan error, 1)
	go func() { done <- g.Run(ctx, func(err error) { assert.NoError(t, err, "Run") }) }()
	<-expired
	cancel()
	assert.ErrorIs(t, <-done, context.Canceled, "Run returned")
	rows := report(t, l, budget.ByTeam)
	if assert.Len(t, rows, 1, "report: one expired entry") {
		assert.Equal(t, budget.Nanos(301_000), rows[0].Spent, "report: spent")
		assert.Zero(t, rows[0].Requests, "report: requests")
	}
}

// notifyJournal signals after each Append.
type notifyJournal struct {
	budget.Journal
	appended chan struct{}
}

func (j notifyJournal) Append(ctx context.Context, e budget.Entry) error {
	err := j.Journal.Append(ctx, e)
	select {
	case j.appended <- struct{}{}:
	default:
	}
	return err
}

func TestNewRejectsBadConfig(t *testing.T) {
	neg := budget.Cap{Limit: -1, Period: budget.Month}
	tests := []struct {
		name string
		edit func(*guard.Config)
	}{
		{"negative price", func(c *guard.Config) { c.Prices.Models["demo-model"] = budget.Price{Input: -1} }},
		{"bad encoding", func(c *guard.Config) { c.Encodings["x"] = "p50k" }},
		{"zero output cap", func(c *guard.Config) { c.OutputCaps["x"] = 0 }},
		{"negative default cap", func(c *guard.Config) { c.DefaultOutputCap = -1 }},
		{"negative team budget", func(c *guard.Config) { c.Teams = map[string]guard.TeamPolicy{"lab": {Budget: &neg}} }},
		{"negative key budget", func(c *guard.Config) {
			c.Teams = map[string]guard.TeamPolicy{"lab": {Keys: map[string]*budget.Cap{"0123456789ab": &neg}}}
		}},
		{"bad period", func(c *guard.Config) { c.Global = &budget.Cap{Limit: 1, Period: "fortnight"} }},
		{"negative rpm", func(c *guard.Config) {
			c.Teams = map[string]guard.TeamPolicy{"lab": {Limits: guard.Limits{RequestsPerMinute: -1}}}
		}},
		{"bad team name", func(c *guard.Config) { c.Teams = map[string]guard.TeamPolicy{"a:b": {}} }},
		{"upstream brace", func(c *guard.Config) { c.Upstreams = map[string]guard.Limits{"{x}": {}} }},
		{"negative lease", func(c *guard.Config) { c.Lease = -time.Second }},
	}
	l := openBolt(t)
	for _, tt := range tests {
		cfg := baseConfig()
		tt.edit(&cfg)
		_, err := guard.New(cfg, l, l, &ratelimit.Local{}, nil)
		assert.Error(t, err, "%s: New", tt.name)
	}
	_, err := guard.New(baseConfig(), l, l, &ratelimit.Local{}, nil)
	assert.NoError(t, err, "good config")
}

func TestKeyID(t *testing.T) {
	var sum [32]byte
	for i := range sum {
		sum[i] = byte(i)
	}
	assert.Equal(t, "000102030405", guard.KeyID(sum), "KeyID")
}

func TestKeyBudget(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {
		Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month},
		Keys:   map[string]*budget.Cap{"0123456789ab": {Limit: 400_000, Period: budget.Day}},
	}}
	g, _ := newGuard(t, cfg, c)
	ctx := context.Background()
	_, err := g.Admit(ctx, helloCall())
	require.NoError(t, err)
	_, err = g.Admit(ctx, helloCall())
	var ex *budget.ExhaustedError
	if assert.ErrorAs(t, err, &ex, "second call of the key") {
		assert.Equal(t, "0123456789ab", ex.Scope.Key, "second call of the key: the key's cap refuses")
		assert.Equal(t, budget.Nanos(99_000), ex.Remaining, "second call of the key: left")
	}
	other := helloCall()
	other.KeyID = "ba9876543210"
	_, err = g.Admit(ctx, other)
	assert.NoError(t, err, "another key of the team")
}

// noOverspend runs 64 clients calling until the budget runs out and
// checks that what was charged never exceeds it and that the ledger and
// the journal both equal the sum of the charges exactly.
// newGuards returns the Guards the clients use (client i uses guards[i %
// len]) and the backend to check.
func noOverspend(t *testing.T, newGuards func(cfg guard.Config) ([]*guard.Guard, backend)) {
	t.Helper()
	const clients, attempts = 64, 12
	cfg := baseConfig()
	limit := usd(t, 0.04) // 40,000,000 nano-USD; each call reserves 151,000, so ~265 fit at worst
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: limit, Period: budget.Month}}}
	guards, l := newGuards(cfg)
	ctx := context.Background()
	var charged, refused atomic.Int64
	var wg sync.WaitGroup
	errs := make(chan error, clients)
	for i := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			g := guards[i%len(guards)]
			rng := rand.New(rand.NewPCG(uint64(i), 7))
			call := helloCall()
			call.N = 1 // worst case 2×500 + 100×1500 = 151,000
			for range attempts {
				tk, err := g.Admit(ctx, call)
				var ex *budget.ExhaustedError
				if errors.As(err, &ex) {
					refused.Add(1)
					return
				}
				if err != nil {
					errs <- err
					return
				}
				// The in-test upstream bills the prompt and 0..100
				// generated tokens, never more than max_tokens.
				ch, err := tk.Settle(ctx, guard.Usage{PromptTokens: 2, CompletionTokens: rng.Int64N(101)}, budget.Miss)
				if err != nil {
					errs <- err
					return
				}
				charged.Add(int64(ch.Cost))
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		require.NoError(t, err)
	}
	require.NotZero(t, refused.Load(), "the budget never ran out; the test proves nothing")
	total := budget.Nanos(charged.Load())
	assert.LessOrEqual(t, total, limit, "charged above the budget")
	b, err := l.Balance(ctx, time.Now(), budget.Scope{Team: "glossary"}, budget.Month)
	require.NoError(t, err)
	assert.Equal(t, budget.Balance{Spent: total}, b, "ledger: spent = sum of charges, nothing held")
	rows := report(t, l, budget.ByTeam)
	if assert.Len(t, rows, 1, "journal report") {
		assert.Equal(t, total, rows[0].Spent, "journal report: spent")
	}
}

func TestNoOverspendEmbedded(t *testing.T) {
	noOverspend(t, func(cfg guard.Config) ([]*guard.Guard, backend) {
		l := openBolt(t)
		g, err := guard.New(cfg, l, l, &ratelimit.Local{}, nil)
		require.NoError(t, err)
		return []*guard.Guard{g}, l
	})
}

// TestNoOverspendRedis runs the same clients against a real redis-server,
// spread over three Guards with their own connections, as three proxy
// processes would be.
func TestNoOverspendRedis(t *testing.T) {
	srv := redistest.Start(t)
	noOverspend(t, func(cfg guard.Config) ([]*guard.Guard, backend) {
		var guards []*guard.Guard
		var l *redisledger.Ledger
		for range 3 {
			c := srv.Client(t)
			l = redisledger.New(c, redisledger.Options{})
			g, err := guard.New(cfg, l, l, redisrate.New(c, redisrate.Options{}), nil)
			require.NoError(t, err)
			guards = append(guards, g)
		}
		return guards, l
	})
}
