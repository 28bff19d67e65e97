package proxy

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"net"
	"net/http"
	"strconv"
	"sync"
	"time"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/tokens"
	"github.com/stintlab/stint/proxy/wire"
)

// Header names for spend figures. They are estimates from configured prices;
// the provider's bill is the record.
const (
	HeaderCost       = "Stint-Cost-Usd"
	HeaderSaved      = "Stint-Saved-Usd"
	HeaderBudgetLeft = "Stint-Budget-Left-Usd"
)

// SpendControl admits and accounts upstream calls against budgets, rate
// limits and prices; *guard.Guard implements it. Options.Spend nil means no
// spend control.
type SpendControl interface {
	Admit(ctx context.Context, c guard.Call) (*guard.Ticket, error)
	Worth(c guard.Call, u guard.Usage) (budget.Nanos, error)
	Saved(ctx context.Context, c guard.Call, u guard.Usage) (budget.Nanos, error)
	Left(ctx context.Context, team string) (budget.Nanos, bool, error)
}

// spendCall describes the upstream call for the prompts at idx (nil: all).
func spendCall(ctx context.Context, t *Team, keyID string, up *Upstream, req *request, items []item, idx []int) guard.Call {
	c := guard.Call{Team: t.Name, KeyID: keyID, Model: req.model, Upstream: up.Name, MaxTokens: req.maxTokens, N: req.n, Run: runOf(ctx)}
	if req.endpoint == endpointChat {
		c.Endpoint = guard.Chat
		c.Messages = chatMessages(req.fields["messages"])
		return c
	}
	add := func(p json.RawMessage) {
		var s string
		if json.Unmarshal(p, &s) == nil {
			c.Prompts = append(c.Prompts, s)
			return
		}
		var ids []json.RawMessage
		if json.Unmarshal(p, &ids) == nil {
			c.PromptTokenIDs = append(c.PromptTokenIDs, len(ids))
		}
	}
	if idx == nil {
		for _, it := range items {
			add(it.prompt)
		}
	} else {
		for _, i := range idx {
			add(items[i].prompt)
		}
	}
	return c
}

// chatMessages flattens chat messages to text for counting: string content
// as is, content parts by their text, anything else by its JSON (which
// over-counts, the safe side for a reservation).
func chatMessages(raw json.RawMessage) []tokens.Message {
	var msgs []map[string]json.RawMessage
	_ = json.Unmarshal(raw, &msgs)
	out := make([]tokens.Message, 0, len(msgs))
	for _, m := range msgs {
		var tm tokens.Message
		_ = json.Unmarshal(m["role"], &tm.Role)
		_ = json.Unmarshal(m["name"], &tm.Name)
		if c, ok := m["content"]; ok && !isNull(c) {
			var s string
			if json.Unmarshal(c, &s) == nil {
				tm.Content = s
			} else {
				tm.Content = string(c)
			}
		}
		for k, v := range m {
			if k != "role" && k != "name" && k != "content" {
				tm.Content += string(v)
			}
		}
		out = append(out, tm)
	}
	return out
}

func guardUsage(u wire.Usage) guard.Usage {
	return guard.Usage{PromptTokens: int64(u.PromptTokens), CompletionTokens: int64(u.CompletionTokens)}
}

// spendError maps an Admit error to the answer the client gets.
func spendError(err error) *apiError {
	var ex *budget.ExhaustedError
	var lim *ratelimit.LimitedError
	switch {
	case errors.As(err, &ex):
		return &apiError{status: http.StatusPaymentRequired, typ: "budget_error", code: "budget_exhausted",
			message: fmt.Sprintf("budget exhausted: %s; %s USD left this period, this call could cost up to %s USD (estimates from configured prices)", ex.Scope, ex.Remaining, ex.Requested)}
	case errors.As(err, &lim):
		return &apiError{status: http.StatusTooManyRequests, typ: errRateLimit, code: "rate_limited", retryAfter: lim.RetryAfter,
			message: fmt.Sprintf("rate limited: retry after %s", lim.RetryAfter.Round(time.Millisecond))}
	case errors.Is(err, budget.ErrUnknownModel):
		return &apiError{status: http.StatusBadRequest, typ: errInvalidRequest, code: "unpriced_model", param: "model", message: err.Error()}
	case errors.Is(err, guard.ErrBadCall), errors.Is(err, guard.ErrTooLarge):
		return &apiError{status: http.StatusBadRequest, typ: errInvalidRequest, code: "over_limit", message: err.Error()}
	default:
		// The ledger's store is away (an outage, a failover under way):
		// worth a retry in a moment.
		return &apiError{status: http.StatusServiceUnavailable, typ: errServer, code: "spend_control_unavailable", retryAfter: time.Second,
			message: "spend control is unavailable, so nothing was forwarded (budgets fail closed): " + err.Error()}
	}
}

// billed reports whether a failed call may have been billed by the
// provider: an error status was an answer (not billed); a connection that
// never opened was not either; anything after the request was sent may
// have been.
func billed(err error) bool {
	var ue *upstreamError
	if errors.As(err, &ue) && ue.status != 0 {
		return false
	}
	var op *net.OpError
	if errors.As(err, &op) && op.Op == "dial" {
		return false
	}
	return true
}

func usd(n budget.Nanos) string { return n.String() }

// leftCache remembers each team's budget left, refreshed by every charge and
// at most once a second otherwise, so hits need not read the ledger.
type leftCache struct {
	mu sync.Mutex // guards m
	m  map[string]leftEntry
}

type leftEntry struct {
	left budget.Nanos
	has  bool
	at   time.Time
}

func (lc *leftCache) set(team string, left budget.Nanos, has bool, now time.Time) {
	lc.mu.Lock()
	defer lc.mu.Unlock()
	if lc.m == nil {
		lc.m = map[string]leftEntry{}
	}
	lc.m[team] = leftEntry{left, has, now}
}

// forget drops team's figure, so the next answer reads the ledger.
func (lc *leftCache) forget(team string) {
	lc.mu.Lock()
	defer lc.mu.Unlock()
	delete(lc.m, team)
}

// left returns the team's budget left, asking sc when the cached figure is
// older than a second.
func (p *Proxy) budgetLeft(ctx context.Context, team string) (budget.Nanos, bool) {
	now := p.now()
	p.left.mu.Lock()
	e, ok := p.left.m[team]
	p.left.mu.Unlock()
	if ok && now.Sub(e.at) < time.Second {
		return e.left, e.has
	}
	left, has, err := p.spend.Left(ctx, team)
	if err != nil {
		return 0, false
	}
	p.left.set(team, left, has, now)
	return left, has
}

// spendHeaders sets the spend headers for an answer.
func (p *Proxy) spendHeaders(ctx context.Context, h http.Header, team string, cost, saved budget.Nanos) {
	if p.spend == nil {
		return
	}
	h.Set(HeaderCost, usd(cost))
	h.Set(HeaderSaved, usd(saved))
	if left, has := p.budgetLeft(ctx, team); has {
		h.Set(HeaderBudgetLeft, usd(left))
	}
}

// retryAfterSeconds renders a wait as whole seconds, rounded up (RFC 9110
// §10.2.3 delay-seconds).
func retryAfterSeconds(d time.Duration) string {
	return strconv.Itoa(int(math.Ceil(d.Seconds())))
}

// spendFigures are an answer's spend headers.
type spendFigures struct {
	team        string
	cost, saved budget.Nanos
}

// admitError carries a refusal from spend control out of a coalesced call.
type admitError struct{ err error }

func (e *admitError) Error() string { return e.err.Error() }
func (e *admitError) Unwrap() error { return e.err }

// settle closes ticket after the upstream call: the real cost from usage on
// success; on failure nothing when the provider answered with an error, the
// reserved amount when it may have billed. The charge goes into res.
func (p *Proxy) settle(ctx context.Context, ticket *guard.Ticket, team string, res *flightResult, callErr error, outcome budget.Outcome) {
	var ch guard.Charge
	var err error
	switch {
	case callErr != nil:
		ch, err = ticket.Fail(ctx, billed(callErr))
	case res.unstorable:
		ch, err = ticket.Fail(ctx, true) // usage unknown: charge the reservation
	default:
		_, u := mergeUsage(res.items)
		ch, err = ticket.Settle(ctx, guardUsage(u), outcome)
	}
	if err != nil && !errors.Is(err, guard.ErrJournal) {
		p.log.Warn("settling a call failed; its lease will settle it at the reserved amount", "team", team, "err", err)
		return
	}
	if err != nil {
		p.log.Warn("spend journal append failed; the ledger is right", "team", team, "err", err)
	}
	if res != nil {
		res.cost = ch.Cost
	}
	if ch.HasBudget {
		p.left.set(team, ch.Remaining, true, p.now())
	}
}

// noteSaved prices what a cache-served answer would have cost now and
// journals it behind the answer. It returns the amount (0 without spend
// control or for a model without a price).
func (p *Proxy) noteSaved(ctx context.Context, t *Team, keyID string, req *request, u wire.Usage) budget.Nanos {
	if p.spend == nil {
		return 0
	}
	c := guard.Call{Team: t.Name, KeyID: keyID, Model: req.model, MaxTokens: req.maxTokens, N: req.n, Run: runOf(ctx)}
	gu := guardUsage(u)
	worth, err := p.spend.Worth(c, gu)
	if err != nil {
		return 0
	}
	p.tasks.run(func() {
		ctx, cancel := context.WithTimeout(context.Background(), writeTimeout)
		defer cancel()
		if _, err := p.spend.Saved(ctx, c, gu); err != nil {
			p.log.Warn("journaling a cache saving failed", "team", t.Name, "err", err)
		}
	})
	return worth
}

// itemsUsage sums the usage of the answered items at idx (nil: all).
func itemsUsage(items []item, idx []int) wire.Usage {
	var u wire.Usage
	if idx == nil {
		for _, it := range items {
			if it.hit != nil {
				u = u.Add(it.hit.usage)
			}
		}
		return u
	}
	for _, i := range idx {
		if items[i].hit != nil {
			u = u.Add(items[i].hit.usage)
		}
	}
	return u
}

// hitIndexes lists the items not in misses.
func hitIndexes(items []item, misses []int) []int {
	missed := make(map[int]bool, len(misses))
	for _, i := range misses {
		missed[i] = true
	}
	var out []int
	for i := range items {
		if !missed[i] {
			out = append(out, i)
		}
	}
	return out
}

var _ SpendControl = (*guard.Guard)(nil)
