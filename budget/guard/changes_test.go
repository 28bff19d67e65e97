package guard_test

import (
	"context"
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
)

// store is a ledger that also keeps run-time budgets, as both backends do.
type store interface {
	backend
	guard.Overrides
}

// ledgerBackend opens a fresh store and returns a function that opens
// another instance on the same data, as a restarted process would.
type ledgerBackend func(t *testing.T) (reopen func() store)

func embeddedBackend(t *testing.T) func() store {
	l := openBolt(t)
	return func() store { return l } // a restart reopens the same file
}

func redisBackend(t *testing.T) ledgerBackend {
	srv := redistest.Start(t)
	var n atomic.Int64
	return func(t *testing.T) func() store {
		prefix := fmt.Sprintf("changes%d", n.Add(1))
		c := srv.Client(t)
		return func() store { return redisledger.New(c, redisledger.Options{Prefix: prefix}) }
	}
}

// TestBudgetChangesCountWhatWasSpent spends under one budget, changes the
// budget in each way it can change (at run time through SetBudget, the
// admin endpoint's call, or in the config and a restart), and checks that
// the new budget counts what was already spent in the period it covers:
// a call that no longer fits is refused with exactly what is left.
func TestBudgetChangesCountWhatWasSpent(t *testing.T) {
	backends := map[string]ledgerBackend{
		"embedded": func(t *testing.T) func() store { return embeddedBackend(t) },
		"redis":    redisBackend(t),
	}
	const (
		key   = "0123456789ab" // helloCall's key id
		spent = 3 * 301_000    // three calls at helloCall's worst case, settled in full
		tight = 1_000_000      // a budget the spend leaves 97,000 of
	)
	big := &budget.Cap{Limit: usd(t, 10), Period: budget.Month}
	capOf := func(p budget.Period) *budget.Cap { return &budget.Cap{Limit: tight, Period: p} }
	type policy struct {
		team   *budget.Cap
		key    *budget.Cap
		global *budget.Cap
	}
	tests := []struct {
		name     string
		before   policy      // the config the spend happens under
		override *budget.Cap // set at run time before the spend (nil: none)
		later    time.Duration
		// change is made after the spend: at run time (set), or by a
		// restart with the after config (restart).
		set     func(ctx context.Context, g *guard.Guard) error
		restart *policy
		scope   budget.Scope // the scope that must refuse
		period  budget.Period
	}{
		{name: "run time: month budget to a day budget", before: policy{team: big},
			set: func(ctx context.Context, g *guard.Guard) error {
				return g.SetBudget(ctx, "glossary", capOf(budget.Day))
			},
			scope: budget.Scope{Team: "glossary"}, period: budget.Day},
		{name: "run time: month budget to a week budget", before: policy{team: big},
			set: func(ctx context.Context, g *guard.Guard) error {
				return g.SetBudget(ctx, "glossary", capOf(budget.Week))
			},
			scope: budget.Scope{Team: "glossary"}, period: budget.Week},
		{name: "run time: day budget to a month budget the next day", before: policy{team: &budget.Cap{Limit: usd(t, 10), Period: budget.Day}}, later: 24 * time.Hour,
			set: func(ctx context.Context, g *guard.Guard) error {
				return g.SetBudget(ctx, "glossary", capOf(budget.Month))
			},
			scope: budget.Scope{Team: "glossary"}, period: budget.Month},
		{name: "run time: day budget to a total budget the next day", before: policy{team: &budget.Cap{Limit: usd(t, 10), Period: budget.Day}}, later: 24 * time.Hour,
			set: func(ctx context.Context, g *guard.Guard) error {
				return g.SetBudget(ctx, "glossary", capOf(budget.Total))
			},
			scope: budget.Scope{Team: "glossary"}, period: budget.Total},
		{name: "run time: a lower cap, same period", before: policy{team: big},
			set: func(ctx context.Context, g *guard.Guard) error {
				return g.SetBudget(ctx, "glossary", capOf(budget.Month))
			},
			scope: budget.Scope{Team: "glossary"}, period: budget.Month},
		{name: "run time: a budget for a team configured without one", before: policy{},
			set: func(ctx context.Context, g *guard.Guard) error {
				return g.SetBudget(ctx, "glossary", capOf(budget.Day))
			},
			scope: budget.Scope{Team: "glossary"}, period: budget.Day},
		{name: "run time: cleared, back to the configured budget of another period", before: policy{team: capOf(budget.Week)}, override: big,
			set:   func(ctx context.Context, g *guard.Guard) error { return g.SetBudget(ctx, "glossary", nil) },
			scope: budget.Scope{Team: "glossary"}, period: budget.Week},
		{name: "restart: the team budget's period changes", before: policy{team: big}, restart: &policy{team: capOf(budget.Day)},
			scope: budget.Scope{Team: "glossary"}, period: budget.Day},
		{name: "restart: a team budget is added", before: policy{}, restart: &policy{team: capOf(budget.Total)},
			scope: budget.Scope{Team: "glossary"}, period: budget.Total},
		{name: "restart: a key budget is added", before: policy{team: big}, restart: &policy{team: big, key: capOf(budget.Week)},
			scope: budget.Scope{Team: "glossary", Key: key}, period: budget.Week},
		{name: "restart: the key budget's period changes", before: policy{key: &budget.Cap{Limit: usd(t, 10), Period: budget.Day}}, restart: &policy{key: capOf(budget.Month)},
			scope: budget.Scope{Team: "glossary", Key: key}, period: budget.Month},
		{name: "restart: a global cap is added", before: policy{team: big}, restart: &policy{team: big, global: capOf(budget.Day)},
			scope: budget.Scope{}, period: budget.Day},
		{name: "restart: the global cap's period changes", before: policy{global: big}, restart: &policy{global: capOf(budget.Week)},
			scope: budget.Scope{}, period: budget.Week},
	}
	for name, open := range backends {
		t.Run(name, func(t *testing.T) {
			for _, tt := range tests {
				t.Run(tt.name, func(t *testing.T) {
					ctx := context.Background()
					c := newClock()
					reopen := open(t)
					newGuard := func(p policy) (*guard.Guard, store) {
						l := reopen()
						cfg := baseConfig()
						cfg.Overrides = l
						cfg.Global = p.global
						tp := guard.TeamPolicy{Budget: p.team}
						if p.key != nil {
							tp.Keys = map[string]*budget.Cap{key: p.key}
						}
						cfg.Teams = map[string]guard.TeamPolicy{"glossary": tp}
						g, err := guard.New(cfg, l, l, &ratelimit.Local{}, c.Now)
						require.NoError(t, err)
						return g, l
					}
					g, l := newGuard(tt.before)
					if tt.override != nil {
						require.NoError(t, g.SetBudget(ctx, "glossary", tt.override))
					}
					for range 3 {
						tk, err := g.Admit(ctx, helloCall())
						require.NoError(t, err)
						_, err = tk.Settle(ctx, guard.Usage{PromptTokens: 2, CompletionTokens: 200}, budget.Miss)
						require.NoError(t, err)
					}
					c.Add(tt.later)
					if tt.restart != nil {
						g, l = newGuard(*tt.restart)
					} else {
						require.NoError(t, tt.set(ctx, g))
					}

					b, err := l.Balance(ctx, c.Now(), tt.scope, tt.period)
					require.NoError(t, err)
					assert.Equal(t, budget.Nanos(spent), b.Spent, "spent this %s in %v after the change", tt.period, tt.scope)
					_, err = g.Admit(ctx, helloCall())
					var ex *budget.ExhaustedError
					require.ErrorAs(t, err, &ex, "a call past the new budget was admitted")
					assert.Equal(t, tt.scope, ex.Scope)
					assert.Equal(t, tt.period, ex.Period)
					assert.Equal(t, budget.Nanos(tight-spent), ex.Remaining)
					if tt.scope == (budget.Scope{Team: "glossary"}) {
						st, err := g.Statement(ctx, budget.Query{Since: c.Now(), Team: "glossary", By: budget.ByTeam})
						require.NoError(t, err)
						require.Len(t, st.Budgets, 1)
						assert.Equal(t, budget.Nanos(spent).String(), st.Budgets[0].SpentUSD, "the standing the admin endpoint answers with")
					}
				})
			}
		})
	}
}
