package redisledger

import (
	"context"
	"encoding/json"
	"fmt"

	"github.com/stintlab/stint/budget"
)

// capsKey is the hash of team budgets set at run time. It is one key, so
// its single-key commands work on a cluster.
func (l *Ledger) capsKey() string { return l.tag("") + ":team-caps" }

// TeamCaps returns the team budgets set at run time (SetTeamCap), which
// take the place of configured ones for every process sharing the Redis.
func (l *Ledger) TeamCaps(ctx context.Context) (map[string]budget.Cap, error) {
	raw, err := l.c.HGetAll(ctx, l.capsKey()).Result()
	if err != nil {
		return nil, fmt.Errorf("redisledger: read team budgets: %w", err)
	}
	caps := make(map[string]budget.Cap, len(raw))
	for team, v := range raw {
		var c budget.Cap
		if err := json.Unmarshal([]byte(v), &c); err != nil {
			return nil, fmt.Errorf("redisledger: budget of team %q: %w", team, err)
		}
		caps[team] = c
	}
	return caps, nil
}

// SetTeamCap stores team's budget; nil removes it, so the configured
// budget applies again.
func (l *Ledger) SetTeamCap(ctx context.Context, team string, c *budget.Cap) error {
	if err := budget.ValidateName(team); err != nil {
		return err
	}
	var err error
	if c == nil {
		err = l.c.HDel(ctx, l.capsKey(), team).Err()
	} else {
		if verr := c.Validate(); verr != nil {
			return verr
		}
		raw, _ := json.Marshal(c)
		err = l.c.HSet(ctx, l.capsKey(), team, raw).Err()
	}
	if err != nil {
		return fmt.Errorf("redisledger: set budget of team %q: %w", team, err)
	}
	return nil
}
