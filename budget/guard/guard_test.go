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

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/ratelimit/redisrate"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/budget/redistest"
	"github.com/stintlab/stint/budget/tokens"
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
			if err != nil {
				t.Fatal(err)
			}
			est := tk.Estimate()
			if est.PromptTokens != tt.wantPrompt || est.OutputTokens != tt.wantOut || est.Cost != tt.wantCost || est.Exact != tt.wantExact {
				t.Errorf("estimate = %+v, want prompt %d, output %d, cost %d, exact %v", est, tt.wantPrompt, tt.wantOut, tt.wantCost, tt.wantExact)
			}
			if tk.Reserved() != tt.wantCost {
				t.Errorf("reserved %d, want %d", tk.Reserved(), tt.wantCost)
			}
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
			if !errors.Is(err, tt.want) {
				t.Fatalf("Admit: got %v, want %v", err, tt.want)
			}
			if n, _ := l.Expire(context.Background(), c.Now().Add(24*time.Hour)); len(n) != 0 {
				t.Errorf("a refused call left %d reservations", len(n))
			}
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
		if err != nil {
			t.Fatalf("call %d: %v", i, err)
		}
		if left, ok := tk.Left(); !ok || left != limit-budget.Nanos(i+1)*301_000 {
			t.Errorf("call %d: left %d %v, want %d", i, left, ok, limit-budget.Nanos(i+1)*301_000)
		}
	}
	_, err := g.Admit(ctx, helloCall())
	var ex *budget.ExhaustedError
	if !errors.As(err, &ex) {
		t.Fatalf("4th Admit: got %v, want *budget.ExhaustedError", err)
	}
	if ex.Remaining != 97_000 || ex.Requested != 301_000 {
		t.Errorf("exhausted %+v, want remaining 97000 (1,000,000 − 3×301,000), requested 301000", ex)
	}
	if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b.Held != 903_000 || b.Spent != 0 {
		t.Errorf("balance %+v, want held 903000 spent 0: the refused call must hold nothing", b)
	}
	if left, has, err := g.Left(ctx, "glossary"); err != nil || !has || left != 97_000 {
		t.Errorf("Left = %d %v %v, want 97000 true", left, has, err)
	}
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
			if err != nil {
				t.Fatal(err)
			}
			c.Add(time.Second)
			ch, err := tk.Settle(ctx, tt.u, budget.Miss)
			if err != nil {
				t.Fatal(err)
			}
			if ch.Cost != tt.want || !ch.HasBudget || ch.Remaining != limit-tt.want || ch.Expired {
				t.Errorf("charge %+v, want cost %d remaining %d", ch, tt.want, limit-tt.want)
			}
			if want := time.Date(2027, 1, 1, 0, 0, 0, 0, time.UTC); !ch.Resets.Equal(want) {
				t.Errorf("resets %v, want %v", ch.Resets, want)
			}
			if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b.Spent != tt.want || b.Held != 0 {
				t.Errorf("balance %+v, want spent %d held 0", b, tt.want)
			}
			if _, err := tk.Settle(ctx, tt.u, budget.Miss); !errors.Is(err, guard.ErrSettled) {
				t.Errorf("second Settle: got %v, want ErrSettled", err)
			}
			rows := report(t, l, budget.ByModel)
			if len(rows) != 1 || rows[0].Spent != tt.want || rows[0].UpstreamCalls != 1 || rows[0].InputTokens != 2 || rows[0].OutputTokens != tt.u.CompletionTokens {
				t.Errorf("report %+v, want one upstream call costing %d", rows, tt.want)
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
		if err != nil {
			t.Fatal(err)
		}
		ch, err := tk.Fail(ctx, tt.billed)
		if err != nil || ch.Cost != tt.want {
			t.Errorf("Fail(billed=%v) = %+v, %v; want cost %d", tt.billed, ch, err, tt.want)
		}
		if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b.Spent != tt.want || b.Held != 0 {
			t.Errorf("billed=%v: balance %+v, want spent %d held 0", tt.billed, b, tt.want)
		}
		if rows := report(t, l, budget.ByTeam); len(rows) != 1 || rows[0].UpstreamCalls != 1 || rows[0].Spent != tt.want {
			t.Errorf("billed=%v: report %+v, want one upstream call costing %d", tt.billed, rows, tt.want)
		}
	}
}

func TestCancelReleasesWithoutJournal(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
	g, l := newGuard(t, cfg, c)
	tk, err := g.Admit(context.Background(), helloCall())
	if err != nil {
		t.Fatal(err)
	}
	if err := tk.Cancel(context.Background()); err != nil {
		t.Fatal(err)
	}
	if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b != (budget.Balance{}) {
		t.Errorf("balance %+v after Cancel, want zero", b)
	}
	if rows := report(t, l, budget.ByTeam); len(rows) != 0 {
		t.Errorf("report %+v after Cancel, want nothing journaled", rows)
	}
	if _, err := tk.Fail(context.Background(), true); !errors.Is(err, guard.ErrSettled) {
		t.Errorf("Fail after Cancel: got %v, want ErrSettled", err)
	}
}

func TestSavedDoesNotSpend(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}, Limits: guard.Limits{RequestsPerMinute: 1}}}
	g, l := newGuard(t, cfg, c)
	ctx := context.Background()
	for range 3 { // more hits than the rate limit allows calls: hits are not limited
		saved, err := g.Saved(ctx, helloCall(), guard.Usage{PromptTokens: 2, CompletionTokens: 37})
		if want := budget.Nanos(56_500); err != nil || saved != want { // hand-worked: 2×500 + 37×1500
			t.Fatalf("Saved = %d, %v; want %d", saved, err, want)
		}
	}
	if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b != (budget.Balance{}) {
		t.Errorf("balance %+v after hits, want zero", b)
	}
	rows := report(t, l, budget.ByTeam)
	if len(rows) != 1 || rows[0].CacheHits != 3 || rows[0].UpstreamCalls != 0 || rows[0].Saved != 3*56_500 || rows[0].Spent != 0 {
		t.Errorf("report %+v, want 3 hits saving 169500, nothing spent", rows)
	}
	if _, err := g.Admit(ctx, helloCall()); err != nil {
		t.Errorf("first real call after hits: %v (hits must not use the rate limit)", err)
	}
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
				if _, err := g.Admit(ctx, helloCall()); err != nil {
					t.Fatalf("call %d: %v", i, err)
				}
			}
			_, err := g.Admit(ctx, helloCall())
			var le *ratelimit.LimitedError
			if !errors.As(err, &le) {
				t.Fatalf("call %d: got %v, want *ratelimit.LimitedError", tt.admitted, err)
			}
			// x/time/rate computes the delay in float seconds; allow a
			// microsecond of rounding.
			if d := le.RetryAfter - tt.wantRetry; d < -time.Microsecond || d > time.Microsecond {
				t.Errorf("retry after %v, want %v", le.RetryAfter, tt.wantRetry)
			}
			want := budget.Nanos(tt.admitted) * 301_000
			if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b.Held != want {
				t.Errorf("held %d, want %d: the refused call's reservation must be released", b.Held, want)
			}
			c.Add(tt.wantRetry)
			if _, err := g.Admit(ctx, helloCall()); err != nil {
				t.Errorf("after waiting the retry-after: %v", err)
			}
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
	if _, err := g.Admit(ctx, helloCall()); err != nil {
		t.Fatal(err)
	}
	call := helloCall()
	call.MaxTokens = 0 // 2 prompt tokens, no output
	if _, err := g.Admit(ctx, call); err != nil {
		t.Errorf("queued call: %v, want admitted after waiting", err)
	}
	big := helloCall()
	big.MaxTokens = 200
	if _, err := g.Admit(ctx, big); !errors.Is(err, guard.ErrTooLarge) {
		t.Errorf("call of 402 tokens under a 202-token limit: got %v, want ErrTooLarge", err)
	}
}

func TestExpireChargesInFull(t *testing.T) {
	c := newClock()
	cfg := baseConfig()
	cfg.Lease = time.Minute
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
	g, l := newGuard(t, cfg, c)
	ctx := context.Background()
	tk, err := g.Admit(ctx, helloCall())
	if err != nil {
		t.Fatal(err)
	}
	c.Add(time.Minute)
	if n, err := g.Expire(ctx); err != nil || n != 1 {
		t.Fatalf("Expire = %d, %v; want 1", n, err)
	}
	if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b.Spent != 301_000 || b.Held != 0 {
		t.Errorf("balance %+v, want the reservation charged in full (301000)", b)
	}
	// The holder comes back late: charged the reserved amount, not
	// twice, and the journal still sums to the ledger.
	ch, err := tk.Settle(ctx, guard.Usage{PromptTokens: 2, CompletionTokens: 5}, budget.Miss)
	if err != nil || !ch.Expired || ch.Cost != 301_000 {
		t.Errorf("late Settle = %+v, %v; want expired, cost 301000", ch, err)
	}
	if b := balance(t, l, c.Now(), budget.Scope{Team: "glossary"}); b.Spent != 301_000 {
		t.Errorf("spent %d after late settle, want 301000", b.Spent)
	}
	rows := report(t, l, budget.ByTeam)
	if len(rows) != 1 || rows[0].Spent != 301_000 || rows[0].Requests != 1 {
		t.Errorf("report %+v, want one request and 301000 spent", rows)
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
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	if _, err := g.Admit(ctx, helloCall()); err != nil {
		t.Fatal(err)
	}
	c.Add(time.Hour)
	done := make(chan error, 1)
	go func() { done <- g.Run(ctx, func(err error) { t.Error(err) }) }()
	<-expired
	cancel()
	if err := <-done; !errors.Is(err, context.Canceled) {
		t.Errorf("Run returned %v, want context.Canceled", err)
	}
	if rows := report(t, l, budget.ByTeam); len(rows) != 1 || rows[0].Spent != 301_000 || rows[0].Requests != 0 {
		t.Errorf("report %+v, want one expired entry of 301000", rows)
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
		if _, err := guard.New(cfg, l, l, &ratelimit.Local{}, nil); err == nil {
			t.Errorf("%s: New accepted it", tt.name)
		}
	}
	if _, err := guard.New(baseConfig(), l, l, &ratelimit.Local{}, nil); err != nil {
		t.Errorf("good config: %v", err)
	}
}

func TestKeyID(t *testing.T) {
	var sum [32]byte
	for i := range sum {
		sum[i] = byte(i)
	}
	if got, want := guard.KeyID(sum), "000102030405"; got != want {
		t.Errorf("KeyID = %q, want %q", got, want)
	}
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
	if _, err := g.Admit(ctx, helloCall()); err != nil {
		t.Fatal(err)
	}
	_, err := g.Admit(ctx, helloCall())
	var ex *budget.ExhaustedError
	if !errors.As(err, &ex) || ex.Scope.Key != "0123456789ab" || ex.Remaining != 99_000 {
		t.Errorf("second call of the key: got %v, want the key's cap refusing with 99000 left", err)
	}
	other := helloCall()
	other.KeyID = "ba9876543210"
	if _, err := g.Admit(ctx, other); err != nil {
		t.Errorf("another key of the team: %v", err)
	}
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
		t.Fatal(err)
	}
	if refused.Load() == 0 {
		t.Fatalf("the budget never ran out; the test proves nothing")
	}
	total := budget.Nanos(charged.Load())
	if total > limit {
		t.Errorf("charged %d, above the budget %d", total, limit)
	}
	b, err := l.Balance(ctx, time.Now(), budget.Scope{Team: "glossary"}, budget.Month)
	if err != nil {
		t.Fatal(err)
	}
	if b.Spent != total || b.Held != 0 {
		t.Errorf("ledger %+v, want spent = sum of charges %d, held 0", b, total)
	}
	rows := report(t, l, budget.ByTeam)
	if len(rows) != 1 || rows[0].Spent != total {
		t.Errorf("journal report %+v, want spent %d", rows, total)
	}
}

func TestNoOverspendEmbedded(t *testing.T) {
	noOverspend(t, func(cfg guard.Config) ([]*guard.Guard, backend) {
		l := openBolt(t)
		g, err := guard.New(cfg, l, l, &ratelimit.Local{}, nil)
		if err != nil {
			t.Fatal(err)
		}
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
			if err != nil {
				t.Fatal(err)
			}
			guards = append(guards, g)
		}
		return guards, l
	})
}
