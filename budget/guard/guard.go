// Package guard admits, settles and accounts one upstream call against a
// team's budgets, rate limits and prices. It is the one place the proxy
// talks to for spend control: the proxy calls Admit before an upstream
// call, then exactly one of Ticket.Settle, Ticket.Fail or Ticket.Cancel
// after it, and Saved for a cache hit.
//
// A Guard composes the budget library: budget/tokens counts the prompt,
// budget.PriceTable prices the worst case, a ratelimit.Limiter queues the
// call under its team's and its upstream's limits, a budget.Ledger holds
// the money (reserve → settle, leases charged in full when they expire)
// and a budget.Journal records every charge and saving.
//
// # Errors and the statuses the proxy answers with
//
//   - budget.ErrUnknownModel (no price and no default price), ErrBadCall
//     (a malformed call) and ErrTooLarge (a call bigger than a whole
//     tokens-per-minute burst, which no wait can admit): 400.
//   - *budget.ExhaustedError (errors.As; it unwraps to budget.ErrExhausted):
//     402, with its Remaining amount in the message. Nothing was reserved.
//   - *ratelimit.LimitedError (unwraps to ratelimit.ErrLimited): 429 with
//     Retry-After set to its RetryAfter rounded up to whole seconds
//     (RFC 9110 §10.2.3). Nothing was reserved.
//   - anything else (the ledger, the journal or Redis unreachable, ctx
//     ended): 503. Budgets fail closed: no call is forwarded without a
//     reservation.
//
// # When the ledger cannot be reached
//
// A call that ends while its ledger is unreachable (a Redis failover, an
// outage) still has its charge or release made: the Ticket queues it and
// answers with the Charge it will make (Charge.Deferred), and Run retries
// the queue every Config.SettleRetry until each lands, at the time the
// call ended, so it charges what the call cost and not the reserved
// amount. A reservation whose outcome Reserve could not tell
// (*budget.InDoubtError) is queued for release the same way. Only what is
// still queued when its lease runs out is left to the sweep, which
// charges it in full; so a team is refused only for money its calls spent
// or may still spend, not for holds of calls that ended while the ledger
// was away.
//
// All times come from the clock given to New, so tests control time
// without sleeping; only the queue wait under a rate limit and the sweep
// and retry tickers of Run use real timers.
package guard

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"sort"
	"strings"
	"sync"
	"time"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/tokens"
)

// Defaults for the zero values of Config.
const (
	DefaultLease       = 10 * time.Minute       // Config.Lease
	DefaultMaxWait     = 5 * time.Second        // Config.MaxWait
	DefaultOutputCap   = 4096                   // Config.DefaultOutputCap
	DefaultSettleRetry = 250 * time.Millisecond // Config.SettleRetry
)

// maxUnsettled bounds the settlements a Guard keeps for retry; past it a
// call's hold is left to its lease.
const maxUnsettled = 10000

// ErrBadCall reports a Call that cannot be priced: a bad team name or key
// id, a negative n or max_tokens other than -1, no prompt at all. The
// proxy answers it with 400.
var ErrBadCall = errors.New("guard: bad call")

// ErrTooLarge reports a call whose worst-case tokens exceed a whole
// tokens-per-minute burst of its team or upstream, so no wait could admit
// it; the message says which limit. The proxy answers it with 400 (the
// client should lower max_tokens or n).
var ErrTooLarge = errors.New("guard: call exceeds a tokens-per-minute limit")

// ErrSettled is returned by a Ticket's Settle, Fail or Cancel after the
// first of them has been called.
var ErrSettled = errors.New("guard: ticket already settled")

// ErrLeaseRanOut is wrapped by RetryUnsettled's error when queued
// settlements could not be made before their leases ran out: the sweep
// charges those reservations in full.
var ErrLeaseRanOut = errors.New("guard: lease ran out before the settlement landed")

// ErrJournal wraps a failure to append to the journal after the ledger
// settled: the ledger's sums are right, only the report line is missing.
// The returned Charge is valid; log the error and answer the client.
var ErrJournal = errors.New("guard: journal append failed")

// Limits are a rate ceiling; zero fields are not limited.
type Limits struct {
	RequestsPerMinute int64 // upstream calls per minute; 0: unlimited
	// TokensPerMinute counts, per call, the counted prompt tokens plus
	// the worst-case output tokens (max_tokens × n × prompts), the way
	// providers count requests against their own token limits. 0:
	// unlimited.
	TokensPerMinute int64
}

// TeamPolicy is what one team may spend and how fast.
type TeamPolicy struct {
	// Budget caps the team's spend per period; nil: no team cap.
	Budget *budget.Cap
	// Keys caps single keys within the team, by key id (see KeyID); a
	// key not listed has no cap of its own.
	Keys map[string]*budget.Cap
	// Limits are the team's rate limits.
	Limits
}

// Config is what a Guard enforces. Zero values mean the documented
// defaults; New copies it.
type Config struct {
	// Prices prices every model; see budget.PriceTable.
	Prices budget.PriceTable
	// Encodings maps models to tokenizer encodings. A model not listed is
	// counted with tokens.UpperBound, which never undercounts.
	Encodings map[string]tokens.Encoding
	// OutputCaps is, per model, the output tokens assumed for a request
	// without max_tokens; models not listed use DefaultOutputCap.
	OutputCaps map[string]int64
	// DefaultOutputCap is the output cap of models not in OutputCaps.
	// 0 means DefaultOutputCap (4096).
	DefaultOutputCap int64
	// Teams holds each team's policy. A team not listed (or listed with
	// no budget) is still reserved for, with a lease, and journaled, but
	// only the Global cap limits it.
	Teams map[string]TeamPolicy
	// Global, when not nil, caps all teams together.
	Global *budget.Cap
	// Upstreams holds each upstream's shared ceiling across all teams,
	// by upstream name (no '{' or '}'); an upstream not listed is not
	// limited.
	Upstreams map[string]Limits
	// Lease is how long a reservation may stay unsettled before the sweep
	// charges it in full; make it longer than the longest upstream call.
	// 0 means DefaultLease (10 minutes).
	Lease time.Duration
	// MaxWait is how long a call may queue under rate limits before it is
	// refused with a *ratelimit.LimitedError. 0 means DefaultMaxWait
	// (5 s); negative means never wait.
	MaxWait time.Duration
	// SweepEvery is how often Run expires leases. 0 means a tenth of the
	// lease, at least 1 s and at most 1 minute.
	SweepEvery time.Duration
	// SettleRetry is how often Run retries the settlements and releases
	// the ledger could not take when their calls ended (see the package
	// doc). 0 means DefaultSettleRetry.
	SettleRetry time.Duration
	// Overrides, when not nil, holds team budgets set at run time (see
	// SetBudget); they replace the configured Budget of their team.
	Overrides Overrides
	// OverrideRefresh is how often a Guard rereads Overrides, so that a
	// budget set through another replica applies here within it. 0 means
	// one second.
	OverrideRefresh time.Duration
	// Location is the time zone budget periods roll over in (nil: UTC).
	// The ledger buckets spend itself, so open it with the same zone; the
	// Guard uses Location for Charge.Resets.
	Location *time.Location
}

// Guard admits and accounts upstream calls. It is safe for concurrent use;
// several Guards (in several processes) may share one ledger, journal and
// limiter.
type Guard struct {
	caps    capsView
	cfg     Config
	counter *tokens.Counter
	ledger  budget.Ledger
	journal budget.Journal
	limiter ratelimit.Limiter
	now     func() time.Time
	// settleJournal is the ledger when it is also the journal and can
	// settle and journal in one step; else nil.
	settleJournal SettleJournaler

	// mu guards unsettled.
	mu sync.Mutex
	// unsettled are the settlements and releases waiting for the ledger,
	// oldest first; Run retries them.
	unsettled []*unsettled
}

// unsettled is a settlement the ledger could not take when its call ended.
type unsettled struct {
	res  budget.Reservation
	cost budget.Nanos
	at   time.Time // when the call ended: the time it is settled at
	// entry is the call's journal entry (its Cost set when it is
	// settled); nil for a release, which is not journaled.
	entry *budget.Entry
	// settled is set once the ledger took it and only the journal entry
	// is left to append.
	settled bool
}

// New validates cfg and returns a Guard on the given backends. now is the
// clock (nil means time.Now).
func New(cfg Config, ledger budget.Ledger, journal budget.Journal, limiter ratelimit.Limiter, now func() time.Time) (*Guard, error) {
	if ledger == nil || journal == nil || limiter == nil {
		return nil, errors.New("guard: ledger, journal and limiter are required")
	}
	if err := cfg.Prices.Validate(); err != nil {
		return nil, fmt.Errorf("guard: prices: %w", err)
	}
	counter, err := tokens.New(cfg.Encodings)
	if err != nil {
		return nil, fmt.Errorf("guard: tokenizers: %w", err)
	}
	for _, m := range sortedKeys(cfg.OutputCaps) {
		if cfg.OutputCaps[m] <= 0 {
			return nil, fmt.Errorf("guard: output cap of model %q is %d, want > 0", m, cfg.OutputCaps[m])
		}
	}
	switch {
	case cfg.DefaultOutputCap < 0:
		return nil, fmt.Errorf("guard: default output cap %d must not be negative", cfg.DefaultOutputCap)
	case cfg.DefaultOutputCap == 0:
		cfg.DefaultOutputCap = DefaultOutputCap
	}
	if cfg.Lease < 0 {
		return nil, fmt.Errorf("guard: lease %v must not be negative", cfg.Lease)
	} else if cfg.Lease == 0 {
		cfg.Lease = DefaultLease
	}
	if cfg.MaxWait == 0 {
		cfg.MaxWait = DefaultMaxWait
	}
	if cfg.SweepEvery < 0 {
		return nil, fmt.Errorf("guard: sweep interval %v must not be negative", cfg.SweepEvery)
	} else if cfg.SweepEvery == 0 {
		cfg.SweepEvery = min(max(cfg.Lease/10, time.Second), time.Minute)
	}
	if cfg.SettleRetry < 0 {
		return nil, fmt.Errorf("guard: settle retry interval %v must not be negative", cfg.SettleRetry)
	} else if cfg.SettleRetry == 0 {
		cfg.SettleRetry = DefaultSettleRetry
	}
	if cfg.Location == nil {
		cfg.Location = time.UTC
	}
	if cfg.OverrideRefresh <= 0 {
		cfg.OverrideRefresh = time.Second
	}
	if cfg.Global != nil {
		if err := cfg.Global.Validate(); err != nil {
			return nil, fmt.Errorf("guard: global cap: %w", err)
		}
	}
	for _, team := range sortedKeys(cfg.Teams) {
		p := cfg.Teams[team]
		// A request with every cap of the team validates the name, the
		// key ids and the caps with the ledger's own rules.
		req := budget.Request{Team: team, Caps: budget.Caps{Team: p.Budget}, Lease: time.Second}
		if err := req.Validate(); err != nil {
			return nil, fmt.Errorf("guard: team %q: %w", team, err)
		}
		for _, key := range sortedKeys(p.Keys) {
			if p.Keys[key] == nil {
				continue
			}
			req := budget.Request{Team: team, Key: key, Caps: budget.Caps{Key: p.Keys[key]}, Lease: time.Second}
			if err := req.Validate(); err != nil || key == "" {
				return nil, fmt.Errorf("guard: team %q key %q: bad key id or cap: %v", team, key, err)
			}
		}
		if err := p.Limits.validate(); err != nil {
			return nil, fmt.Errorf("guard: team %q: %w", team, err)
		}
	}
	for _, up := range sortedKeys(cfg.Upstreams) {
		if up == "" || strings.ContainsAny(up, "{}") {
			return nil, fmt.Errorf("guard: upstream name %q must be non-empty and hold no braces", up)
		}
		if err := cfg.Upstreams[up].validate(); err != nil {
			return nil, fmt.Errorf("guard: upstream %q: %w", up, err)
		}
	}
	if now == nil {
		now = time.Now
	}
	g := &Guard{cfg: cfg, counter: counter, ledger: ledger, journal: journal, limiter: limiter, now: now}
	if sj, ok := ledger.(SettleJournaler); ok && any(ledger) == any(journal) {
		g.settleJournal = sj
	}
	return g, nil
}

func (l Limits) validate() error {
	if l.RequestsPerMinute < 0 || l.TokensPerMinute < 0 {
		return fmt.Errorf("limits %+v must not be negative", l)
	}
	return nil
}

// KeyID returns the id a client key is known by in budgets and in the
// journal: the first 12 hex digits of its SHA-256 (sum is that hash, as
// stored in the config). 48 bits tell a team's keys apart and reveal
// nothing usable about the key.
func KeyID(sum [sha256.Size]byte) string { return hex.EncodeToString(sum[:6]) }

// Call describes one upstream call to admit: who makes it and what it
// asks for.
type Call struct {
	Team     string // the authenticated team
	KeyID    string // the calling key's id (KeyID); empty if none
	Model    string // the model as requested
	Upstream string // the upstream it goes to (for its shared ceiling)
	Run      string // the Stint-Run id, if any
	// Endpoint is "chat" for chat completions (Messages are counted) and
	// anything else for completions (Prompts and PromptTokenIDs).
	Endpoint string
	// Prompts are the text prompts actually sent upstream, one per
	// prompt item (cache hits of a split request left out).
	Prompts []string
	// PromptTokenIDs are the lengths of prompts given as token ids,
	// one per such prompt item; they count exactly.
	PromptTokenIDs []int
	// Messages are the chat messages, flattened to text.
	Messages []tokens.Message
	// MaxTokens is the request's max_tokens, or -1 if absent (the model's
	// output cap is assumed).
	MaxTokens int
	// N is the number of choices per prompt; 0 means 1.
	N int
}

// Chat is the Call.Endpoint value for chat completions.
const Chat = "chat"

// Usage is what the upstream's usage object reported.
type Usage struct {
	PromptTokens       int64 // prompt tokens, cached ones included
	CompletionTokens   int64 // generated tokens
	CachedPromptTokens int64 // the part of PromptTokens served from the provider's prompt cache
}

// Estimate is the worst case Admit reserved for.
type Estimate struct {
	PromptTokens int64        // counted prompt tokens (all prompt items)
	OutputTokens int64        // max_tokens (or the cap) × n × prompt items
	Cost         budget.Nanos // the reserved amount
	// Exact is true when every prompt text was counted with the model's
	// tokenizer; false when tokens.UpperBound stood in.
	Exact bool
}

// Ticket is an admitted call holding a reservation. Call exactly one of
// Settle, Fail or Cancel; a second call returns ErrSettled. A ticket never
// settled is charged in full when its lease expires (see Guard.Run).
type Ticket struct {
	g    *Guard
	call Call
	rate budget.Rate
	est  Estimate
	res  budget.Reservation
	// token is a one-slot channel holding the right to settle, taken by
	// the first of Settle, Fail and Cancel.
	token chan struct{}
}

// Charge is what a settled call cost.
type Charge struct {
	// Cost is what the ledger charged (the Stint-Cost-Usd header).
	Cost budget.Nanos
	// Remaining is the least budget left across the call's capped scopes
	// after settling (Stint-Budget-Left-Usd), valid when HasBudget.
	Remaining budget.Nanos
	// HasBudget is false when the call had no cap at all.
	HasBudget bool
	// Expired reports that the lease had run out before settling, so the
	// reserved amount (at least) was charged.
	Expired bool
	// Resets is when the team's budget period ends (zero for a total
	// budget or no budget).
	Resets time.Time
	// Deferred reports that the ledger could not be reached when the call
	// ended: Cost is queued and Run retries it until it lands (see the
	// package doc); Remaining is then the figure from the reservation.
	Deferred bool
}

// Admit prices c's worst case, reserves it on the ledger under the team's,
// the key's and the global caps, and queues the call under its team's and
// upstream's rate limits (waiting up to MaxWait). See the package doc for
// the errors and their statuses.
//
// The reservation comes before the rate limits, although a refused call
// could then have waited for nothing: it keeps a team whose budget is
// spent from using up the upstream's shared ceiling with calls that are
// refused anyway. A call refused by a rate limit has its reservation
// released before Admit returns.
func (g *Guard) Admit(ctx context.Context, c Call) (*Ticket, error) {
	rate, est, err := g.estimate(c)
	if err != nil {
		return nil, err
	}
	pol := g.cfg.Teams[c.Team]
	caps := budget.Caps{Team: g.teamCap(ctx, c.Team), Global: g.cfg.Global}
	if c.KeyID != "" {
		caps.Key = pol.Keys[c.KeyID]
	}
	now := g.now()
	res, err := g.ledger.Reserve(ctx, now, budget.Request{
		Team: c.Team, Key: c.KeyID, Amount: est.Cost, Caps: caps, Lease: g.cfg.Lease,
	})
	if err != nil {
		var doubt *budget.InDoubtError
		if errors.As(err, &doubt) {
			// It may be held: release it once the ledger answers.
			g.addUnsettled(&unsettled{res: doubt.Reservation, at: now})
		}
		var ex *budget.ExhaustedError
		if errors.As(err, &ex) {
			return nil, ex
		}
		return nil, fmt.Errorf("guard: reserve: %w", err)
	}
	t := &Ticket{g: g, call: c, rate: rate, est: est, res: res, token: make(chan struct{}, 1)}
	t.token <- struct{}{}
	if err := g.queue(ctx, now, c, est.PromptTokens+est.OutputTokens); err != nil {
		if _, cerr := t.release(context.WithoutCancel(ctx)); cerr != nil {
			err = errors.Join(err, fmt.Errorf("guard: release after refusal: %w", cerr))
		}
		return nil, err
	}
	return t, nil
}

// estimate prices c's worst case.
func (g *Guard) estimate(c Call) (budget.Rate, Estimate, error) {
	if err := budget.ValidateName(c.Team); err != nil {
		return budget.Rate{}, Estimate{}, fmt.Errorf("%w: %w", ErrBadCall, err)
	}
	if err := budget.ValidateScope(budget.Scope{Team: c.Team, Key: c.KeyID}); err != nil {
		return budget.Rate{}, Estimate{}, fmt.Errorf("%w: %w", ErrBadCall, err)
	}
	if c.MaxTokens < -1 || c.N < 0 {
		return budget.Rate{}, Estimate{}, fmt.Errorf("%w: max_tokens %d and n %d must not be negative", ErrBadCall, c.MaxTokens, c.N)
	}
	rate, err := g.cfg.Prices.Rate(c.Model)
	if err != nil {
		return budget.Rate{}, Estimate{}, err
	}
	var est Estimate
	var items int64
	if c.Endpoint == Chat {
		n, err := g.counter.Chat(c.Model, c.Messages)
		if err != nil {
			return budget.Rate{}, Estimate{}, fmt.Errorf("guard: count prompt: %w", err)
		}
		est.PromptTokens, est.Exact, items = n.Tokens, n.Encoding != "", 1
	} else {
		n, err := g.counter.Prompt(c.Model, c.Prompts...)
		if err != nil {
			return budget.Rate{}, Estimate{}, fmt.Errorf("guard: count prompt: %w", err)
		}
		est.PromptTokens, est.Exact = n.Tokens, n.Encoding != "" || len(c.Prompts) == 0
		for _, ids := range c.PromptTokenIDs {
			if ids < 0 {
				return budget.Rate{}, Estimate{}, fmt.Errorf("%w: negative token-id prompt length %d", ErrBadCall, ids)
			}
			est.PromptTokens += int64(ids)
		}
		items = int64(len(c.Prompts) + len(c.PromptTokenIDs))
		if items == 0 {
			return budget.Rate{}, Estimate{}, fmt.Errorf("%w: no prompt to send", ErrBadCall)
		}
	}
	out := int64(c.MaxTokens)
	if out < 0 {
		out = g.outputCap(c.Model)
	}
	est.OutputTokens = out * int64(max(c.N, 1)) * items
	if est.OutputTokens/items/int64(max(c.N, 1)) != out {
		return budget.Rate{}, Estimate{}, fmt.Errorf("%w: worst-case output tokens overflow", ErrBadCall)
	}
	// The worst case prices every prompt token at the higher of the input
	// and cached-input prices: the prompt cache may make a token dearer
	// (some providers charge for writing it) and the reservation must
	// cover whatever the usage turns out to be.
	worst := rate
	worst.Input = max(rate.Input, rate.CachedInput)
	est.Cost, err = worst.Cost(budget.Usage{InputTokens: est.PromptTokens, OutputTokens: est.OutputTokens})
	if err != nil {
		return budget.Rate{}, Estimate{}, fmt.Errorf("%w: %w", ErrBadCall, err)
	}
	return rate, est, nil
}

func (g *Guard) outputCap(model string) int64 {
	if n, ok := g.cfg.OutputCaps[model]; ok {
		return n
	}
	return g.cfg.DefaultOutputCap
}

// queue takes one request and n tokens from each of the call's limits and
// waits until all of them admit it. The limits are taken at the same time
// now, so the wait is the longest of their delays. Units already taken
// from one limit when another refuses are not given back (the Limiter
// contract), which errs on the side of the ceiling.
func (g *Guard) queue(ctx context.Context, now time.Time, c Call, n int64) error {
	type dim struct {
		key  string
		what string
		rate int64
		n    int64
	}
	team := g.cfg.Teams[c.Team].Limits
	up := g.cfg.Upstreams[c.Upstream]
	// Team names hold no '#', so upstream keys never meet team keys.
	dims := []dim{
		{c.Team + ":rpm", "team " + c.Team + " requests_per_minute", team.RequestsPerMinute, 1},
		{c.Team + ":tpm", "team " + c.Team + " tokens_per_minute", team.TokensPerMinute, n},
		{"#up:" + c.Upstream + ":rpm", "upstream " + c.Upstream + " requests_per_minute", up.RequestsPerMinute, 1},
		{"#up:" + c.Upstream + ":tpm", "upstream " + c.Upstream + " tokens_per_minute", up.TokensPerMinute, n},
	}
	maxWait := max(g.cfg.MaxWait, 0)
	if dl, ok := ctx.Deadline(); ok {
		maxWait = max(min(maxWait, time.Until(dl)), 0)
	}
	var wait time.Duration
	for _, d := range dims {
		if d.rate == 0 {
			continue
		}
		lim := ratelimit.Limit{Rate: d.rate, Per: time.Minute}
		if d.n > lim.BurstSize() {
			return fmt.Errorf("%w: the call's worst case of %d tokens is more than %s (%d); lower max_tokens or n", ErrTooLarge, d.n, d.what, d.rate)
		}
		w, err := g.limiter.Reserve(ctx, now, d.key, lim, d.n, maxWait)
		if err != nil {
			var le *ratelimit.LimitedError
			if errors.As(err, &le) {
				return le
			}
			return fmt.Errorf("guard: rate limit %s: %w", d.what, err)
		}
		wait = max(wait, w)
	}
	if wait <= 0 {
		return nil
	}
	timer := time.NewTimer(wait)
	defer timer.Stop()
	select {
	case <-timer.C:
		return nil
	case <-ctx.Done():
		return fmt.Errorf("guard: waiting for rate limits: %w", ctx.Err())
	}
}

// Estimate returns the worst case the ticket reserved for.
func (t *Ticket) Estimate() Estimate { return t.est }

// Reserved returns the amount the ticket holds.
func (t *Ticket) Reserved() budget.Nanos { return t.res.Amount }

// Left returns the least budget left across the call's capped scopes
// after its reservation, and whether it had any cap.
func (t *Ticket) Left() (budget.Nanos, bool) { return t.res.Remaining, t.res.Remaining >= 0 }

// Settle charges the actual cost of the answered call from its usage,
// releases the rest of the reservation and journals the call with the
// given outcome (budget.Miss or budget.Bypass). An answer without a usage
// object should be settled with Fail(ctx, true) instead.
//
// Settling is not cancelled with ctx (a client that hangs up after the
// upstream answered must still be charged); ctx's values are kept.
func (t *Ticket) Settle(ctx context.Context, u Usage, outcome budget.Outcome) (Charge, error) {
	if u.PromptTokens < 0 || u.CompletionTokens < 0 || u.CachedPromptTokens < 0 {
		return Charge{}, fmt.Errorf("%w: negative usage %+v", ErrBadCall, u)
	}
	if outcome != budget.Miss && outcome != budget.Bypass {
		return Charge{}, fmt.Errorf("%w: settle outcome %q, want miss or bypass", ErrBadCall, outcome)
	}
	// A provider reporting more cached tokens than prompt tokens is
	// taken at its prompt count, all of it cached.
	bu := budget.Usage{InputTokens: u.PromptTokens, CachedInputTokens: min(u.CachedPromptTokens, u.PromptTokens), OutputTokens: u.CompletionTokens}
	cost, err := t.rate.Cost(bu)
	if err != nil {
		return Charge{}, fmt.Errorf("guard: price usage: %w", err)
	}
	return t.finish(ctx, cost, bu, outcome, true)
}

// Fail settles a call whose upstream request failed. billed=false: the
// provider answered with an error status and billed nothing, so nothing is
// charged. billed=true: the request was sent and then timed out or lost
// its connection (or the answer had no usage), so the provider may have
// billed it; the reserved amount is charged, conservatively. Either way
// the call is journaled as an upstream call.
func (t *Ticket) Fail(ctx context.Context, billed bool) (Charge, error) {
	var cost budget.Nanos
	var u budget.Usage
	if billed {
		cost = t.res.Amount
		// The prompt was sent; what came back is unknown.
		u = budget.Usage{InputTokens: t.est.PromptTokens}
	}
	return t.finish(ctx, cost, u, budget.Miss, true)
}

// Cancel releases the reservation of a call that was never sent upstream
// (the breaker was open, the client left first). Nothing is charged or
// journaled. A release the ledger cannot take now is queued (see the
// package doc).
func (t *Ticket) Cancel(ctx context.Context) error {
	select {
	case <-t.token:
	default:
		return ErrSettled
	}
	_, err := t.release(context.WithoutCancel(ctx))
	return err
}

// release settles the reservation at 0, or queues that if the ledger
// cannot take it now.
func (t *Ticket) release(ctx context.Context) (settled, error) {
	at := t.g.now()
	ch, err := t.settleAt(ctx, at, 0)
	if retryable(err) {
		return settled{Charge: t.postpone(at, 0, nil)}, nil
	}
	return ch, err
}

// retryable reports whether a failed settlement should be retried: the
// ledger did not refuse it (a bad request, or a reservation not held),
// it did not answer.
func retryable(err error) bool {
	return err != nil && !errors.Is(err, budget.ErrInvalid) && !errors.Is(err, budget.ErrNotHeld)
}

// postpone queues the settlement of the ticket at cost, made at time at, with
// its journal entry e (nil for a release), and returns the Charge it will
// make.
func (t *Ticket) postpone(at time.Time, cost budget.Nanos, e *budget.Entry) Charge {
	ch := Charge{Cost: cost, Remaining: t.res.Remaining, HasBudget: t.res.Remaining >= 0, Resets: t.resets(at), Deferred: true}
	if !at.Before(t.res.Deadline) {
		ch.Cost, ch.Expired = max(cost, t.res.Amount), true
	}
	t.g.addUnsettled(&unsettled{res: t.res, cost: cost, at: at, entry: e})
	return ch
}

// addUnsettled queues u for Run to retry; past maxUnsettled it is left to
// its lease.
func (g *Guard) addUnsettled(u *unsettled) {
	g.mu.Lock()
	defer g.mu.Unlock()
	if len(g.unsettled) < maxUnsettled {
		g.unsettled = append(g.unsettled, u)
	}
}

// Unsettled returns how many settlements and releases wait for the ledger.
func (g *Guard) Unsettled() int {
	g.mu.Lock()
	defer g.mu.Unlock()
	return len(g.unsettled)
}

// RetryUnsettled tries every queued settlement and release once, at the
// time its call ended, and keeps those the ledger still does not take. One
// whose lease has run out is dropped: the sweep charges it in full. It
// returns how many are left and, joined, why some could not be made.
func (g *Guard) RetryUnsettled(ctx context.Context) (int, error) {
	g.mu.Lock()
	todo := g.unsettled
	g.unsettled = nil
	g.mu.Unlock()
	var keep []*unsettled
	var failed, dropped int
	var firstErr error
	now := g.now()
	for i, u := range todo {
		if ctx.Err() != nil {
			keep = append(keep, todo[i:]...)
			break
		}
		if !u.settled && !now.Before(u.res.Deadline) {
			dropped++
			continue
		}
		if err := g.settleQueued(ctx, u); err != nil {
			keep = append(keep, u)
			failed++
			if firstErr == nil {
				firstErr = err
			}
		}
	}
	g.mu.Lock()
	g.unsettled = append(keep, g.unsettled...)
	left := len(g.unsettled)
	g.mu.Unlock()
	var errs []error
	if dropped > 0 {
		errs = append(errs, fmt.Errorf("%w: %d reservations; the sweep charges them in full", ErrLeaseRanOut, dropped))
	}
	if failed > 0 {
		errs = append(errs, fmt.Errorf("guard: %d settlements still wait for the ledger: %w", failed, firstErr))
	}
	return left, errors.Join(errs...)
}

// settleQueued makes one queued settlement and appends its journal entry.
// It settles and journals in two steps even on a SettleJournaler: an
// earlier try may have landed with its answer lost, and the entry then
// needs the call's cost, not the 0 such a ledger journals for a
// reservation it no longer holds.
func (g *Guard) settleQueued(ctx context.Context, u *unsettled) error {
	if !u.settled {
		st, err := g.ledger.Settle(ctx, u.at, u.res, u.cost)
		if retryable(err) {
			return err
		}
		u.settled = true
		if u.entry != nil {
			u.entry.Cost = st.Charged
			if errors.Is(err, budget.ErrNotHeld) {
				// Run drops what is queued past its lease, and the sweep
				// charges nothing before it: an earlier try of this
				// settlement landed and its answer was lost.
				u.entry.Cost = u.cost
				if !u.at.Before(u.res.Deadline) {
					u.entry.Cost = max(u.cost, u.res.Amount)
				}
			}
		}
	}
	if u.entry == nil {
		return nil
	}
	if err := g.journal.Append(ctx, *u.entry); err != nil {
		return fmt.Errorf("%w: %w", ErrJournal, err)
	}
	return nil
}

// finish takes the settle token, settles cost and journals the call.
func (t *Ticket) finish(ctx context.Context, cost budget.Nanos, u budget.Usage, outcome budget.Outcome, upstream bool) (Charge, error) {
	select {
	case <-t.token:
	default:
		return Charge{}, ErrSettled
	}
	ctx = context.WithoutCancel(ctx)
	e := budget.Entry{
		Team: t.call.Team, KeyID: t.call.KeyID, Model: t.call.Model, Run: t.call.Run,
		InputTokens: u.InputTokens, OutputTokens: u.OutputTokens, Outcome: outcome, Upstream: upstream,
	}
	if sj := t.g.settleJournal; sj != nil {
		// One durable step for the charge and its journal entry.
		e.Time = t.g.now()
		ch, err := t.settleWith(e.Time, func(now time.Time) (budget.Settlement, error) {
			return sj.SettleAndAppend(ctx, now, t.res, cost, e)
		})
		if retryable(err) {
			return t.postpone(e.Time, cost, &e), nil
		}
		return ch.Charge, err
	}
	at := t.g.now()
	ch, err := t.settleAt(ctx, at, cost)
	if retryable(err) {
		e.Time = at
		return t.postpone(at, cost, &e), nil
	}
	if err != nil {
		return Charge{}, err
	}
	e.Time, e.Cost = t.g.now(), ch.Cost
	if ch.notHeld {
		// The sweep charged the reservation in full and journaled that
		// as an Expired entry; this entry records the answer only, so
		// the journal's sum of costs stays the ledger's.
		e.Cost = 0
	}
	if err := t.g.journal.Append(ctx, e); err != nil {
		return ch.Charge, fmt.Errorf("%w: %w", ErrJournal, err)
	}
	return ch.Charge, nil
}

// SettleJournaler settles a reservation and journals its entry in one
// durable step (boltledger.Ledger does); a Guard whose ledger is also its
// journal and implements it saves a write per call. The entry's Cost is
// set by the ledger: the amount charged, or 0 when the reservation was no
// longer held (then ErrNotHeld is returned).
type SettleJournaler interface {
	SettleAndAppend(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos, e budget.Entry) (budget.Settlement, error)
}

type settled struct {
	Charge
	notHeld bool // the sweep had already charged the reservation
}

// settleAt settles the reservation at cost on the ledger at time at.
func (t *Ticket) settleAt(ctx context.Context, at time.Time, cost budget.Nanos) (settled, error) {
	return t.settleWith(at, func(now time.Time) (budget.Settlement, error) {
		return t.g.ledger.Settle(ctx, now, t.res, cost)
	})
}

// settleWith runs a settlement at now and reads its outcome.
func (t *Ticket) settleWith(now time.Time, do func(time.Time) (budget.Settlement, error)) (settled, error) {
	st, err := do(now)
	var out settled
	out.Resets = t.resets(now)
	switch {
	case errors.Is(err, budget.ErrNotHeld):
		// The lease ran out and the sweep charged the reserved amount.
		out.Cost, out.Expired, out.notHeld = t.res.Amount, true, true
		out.Remaining, out.HasBudget = t.res.Remaining, t.res.Remaining >= 0
		return out, nil
	case err != nil:
		return settled{}, fmt.Errorf("guard: settle: %w", err)
	}
	out.Cost, out.Expired = st.Charged, st.Expired
	out.Remaining, out.HasBudget = st.Remaining, st.Remaining >= 0
	return out, nil
}

func (t *Ticket) resets(now time.Time) time.Time {
	if c := t.res.Caps.Team; c != nil {
		return c.Period.End(now, t.g.cfg.Location)
	}
	return time.Time{}
}

// Saved journals a cache hit: it costs nothing and touches no ledger cap
// or rate limit; the entry's Saved is what the call would cost now at the
// model's price for u (the cached answer's usage). It returns that amount
// (the Stint-Saved-Usd header).
func (g *Guard) Saved(ctx context.Context, c Call, u Usage) (budget.Nanos, error) {
	if err := budget.ValidateName(c.Team); err != nil {
		return 0, fmt.Errorf("%w: %w", ErrBadCall, err)
	}
	saved, err := g.Worth(c, u)
	if err != nil {
		return 0, err
	}
	err = g.journal.Append(ctx, budget.Entry{
		Time: g.now(), Team: c.Team, KeyID: c.KeyID, Model: c.Model, Run: c.Run,
		InputTokens: u.PromptTokens, OutputTokens: u.CompletionTokens, Saved: saved, Outcome: budget.Hit,
	})
	if err != nil {
		return saved, fmt.Errorf("%w: %w", ErrJournal, err)
	}
	return saved, nil
}

// Left returns the least budget left of team's cap and the global cap in
// their current periods (limit minus spend and holds, never below zero),
// for the Stint-Budget-Left-Usd header; has is false when neither cap is
// set.
func (g *Guard) Left(ctx context.Context, team string) (left budget.Nanos, has bool, err error) {
	now := g.now()
	check := func(s budget.Scope, c *budget.Cap) error {
		if c == nil {
			return nil
		}
		b, err := g.ledger.Balance(ctx, now, s, c.Period)
		if err != nil {
			return fmt.Errorf("guard: balance of %s: %w", s, err)
		}
		l := max(c.Limit-b.Spent-b.Held, 0)
		if !has || l < left {
			left, has = l, true
		}
		return nil
	}
	if err := check(budget.Scope{Team: team}, g.teamCap(ctx, team)); err != nil {
		return 0, false, err
	}
	if err := check(budget.Scope{}, g.cfg.Global); err != nil {
		return 0, false, err
	}
	return left, has, nil
}

// Expire charges every reservation whose lease has run out (at the
// Guard's clock) at its reserved amount and journals each as an Expired
// entry (model and run are unknown then: the reservation's holder is
// gone). It returns how many it charged; Run calls it periodically.
func (g *Guard) Expire(ctx context.Context) (int, error) {
	now := g.now()
	expired, err := g.ledger.Expire(ctx, now)
	var errs []error
	if err != nil {
		errs = append(errs, fmt.Errorf("guard: expire: %w", err))
	}
	for _, r := range expired {
		e := budget.Entry{Time: now, Team: r.Team, KeyID: r.Key, Cost: r.Amount, Outcome: budget.Expired}
		if err := g.journal.Append(ctx, e); err != nil {
			errs = append(errs, fmt.Errorf("%w: expired reservation %s: %w", ErrJournal, r.ID, err))
		}
	}
	return len(expired), errors.Join(errs...)
}

// Run expires leases every SweepEvery and retries the queued settlements
// (RetryUnsettled) every SettleRetry, until ctx ends, passing errors to
// onError (which may be nil; settlements still waiting are reported at most
// once per SweepEvery, ErrLeaseRanOut at once),
// and returns ctx's error. Run it in one goroutine per process; several
// processes may sweep one store, each expired reservation reaches one of
// them. Settlements still queued when ctx ends are left to their leases.
//
// It is budget.Sweep's loop written out because budget.Sweep hands the
// ledger the ticker's wall time, while every time a Guard gives its ledger
// comes from its own clock.
func (g *Guard) Run(ctx context.Context, onError func(error)) error {
	tick := time.NewTicker(g.cfg.SweepEvery)
	defer tick.Stop()
	retry := time.NewTicker(g.cfg.SettleRetry)
	defer retry.Stop()
	var retryErr error
	report := func(err error) {
		if err != nil && onError != nil && ctx.Err() == nil {
			onError(err)
		}
	}
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-tick.C:
			_, err := g.Expire(ctx)
			report(err)
			report(retryErr)
			retryErr = nil
		case <-retry.C:
			if g.Unsettled() > 0 {
				_, err := g.RetryUnsettled(ctx)
				if errors.Is(err, ErrLeaseRanOut) {
					report(err)
					err = nil
				}
				retryErr = err
			}
		}
	}
}

func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}
