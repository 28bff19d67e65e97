package guard

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/stintlab/stint/budget"
)

// Overrides keeps team budgets set at run time, shared by every replica on
// the same store; boltledger.Ledger and redisledger.Ledger implement it.
type Overrides interface {
	// TeamCaps returns every team budget set at run time.
	TeamCaps(ctx context.Context) (map[string]budget.Cap, error)
	// SetTeamCap stores team's budget; nil removes it.
	SetTeamCap(ctx context.Context, team string, c *budget.Cap) error
}

// ErrNoOverrides is returned by SetBudget on a Guard without Overrides.
var ErrNoOverrides = errors.New("guard: budgets cannot be set at run time: no override store")

// capsView is the Guard's copy of the overrides, reread at most every
// OverrideRefresh.
type capsView struct {
	mu      sync.Mutex // guards the fields below
	caps    map[string]budget.Cap
	readAt  time.Time
	reading bool // one caller rereads; the others use the copy meanwhile
}

// teamCap returns team's budget: the override if one is set, else the
// configured one. A failed reread keeps the last copy (the ledger's own
// failure, if the store is down, refuses the call anyway).
func (g *Guard) teamCap(ctx context.Context, team string) *budget.Cap {
	conf := g.cfg.Teams[team].Budget
	if g.cfg.Overrides == nil {
		return conf
	}
	v := &g.caps
	now := g.now()
	v.mu.Lock()
	stale := v.caps == nil || now.Sub(v.readAt) >= g.cfg.OverrideRefresh
	// Until a first read succeeds every caller reads; after that one
	// rereads while the others use the copy.
	reread := stale && (!v.reading || v.caps == nil)
	if reread {
		v.reading = true
	}
	v.mu.Unlock()
	if reread {
		caps, err := g.cfg.Overrides.TeamCaps(ctx)
		v.mu.Lock()
		v.reading = false
		if err == nil {
			v.caps, v.readAt = caps, now
		}
		v.mu.Unlock()
	}
	v.mu.Lock()
	defer v.mu.Unlock()
	if c, ok := v.caps[team]; ok {
		return &c
	}
	return conf
}

// SetBudget sets team's budget at run time, replacing the configured one
// on every replica sharing the store (within their OverrideRefresh); nil
// goes back to the configured budget. It applies to this Guard at once.
func (g *Guard) SetBudget(ctx context.Context, team string, c *budget.Cap) error {
	if g.cfg.Overrides == nil {
		return ErrNoOverrides
	}
	if _, ok := g.cfg.Teams[team]; !ok {
		return fmt.Errorf("%w: unknown team %q", ErrBadCall, team)
	}
	if c != nil {
		if err := c.Validate(); err != nil {
			return fmt.Errorf("%w: %w", ErrBadCall, err)
		}
	}
	if err := g.cfg.Overrides.SetTeamCap(ctx, team, c); err != nil {
		return fmt.Errorf("guard: set budget: %w", err)
	}
	caps, err := g.cfg.Overrides.TeamCaps(ctx)
	g.caps.mu.Lock()
	if err == nil {
		g.caps.caps, g.caps.readAt = caps, g.now()
	} else {
		g.caps.caps = nil // reread on next use
	}
	g.caps.mu.Unlock()
	return nil
}

// Budgets returns every team's budget in force: configured, with run-time
// overrides in their place. Teams without a budget are absent.
func (g *Guard) Budgets(ctx context.Context) map[string]budget.Cap {
	out := map[string]budget.Cap{}
	for team := range g.cfg.Teams {
		if c := g.teamCap(ctx, team); c != nil {
			out[team] = *c
		}
	}
	return out
}

// Statement reports spend from the journal with every capped team's
// standing; see budget.NewStatement.
func (g *Guard) Statement(ctx context.Context, q budget.Query) (budget.Statement, error) {
	if q.Location == nil {
		q.Location = g.cfg.Location
	}
	return budget.NewStatement(ctx, g.journal, g.ledger, q, g.Budgets(ctx), g.now())
}
