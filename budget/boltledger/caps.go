package boltledger

import (
	"context"
	"encoding/json"
	"fmt"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
)

// TeamCaps returns the team budgets set at run time (SetTeamCap), which
// take the place of configured ones.
func (l *Ledger) TeamCaps(ctx context.Context) (map[string]budget.Cap, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	caps := map[string]budget.Cap{}
	err := l.db.View(func(tx *bbolt.Tx) error {
		return tx.Bucket(capsBucket).ForEach(func(k, v []byte) error {
			var c budget.Cap
			if err := json.Unmarshal(v, &c); err != nil {
				return fmt.Errorf("team %q: %w", k, err)
			}
			caps[string(k)] = c
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("boltledger: read team budgets: %w", err)
	}
	return caps, nil
}

// SetTeamCap stores team's budget, durably; nil removes it, so the
// configured budget applies again.
func (l *Ledger) SetTeamCap(ctx context.Context, team string, c *budget.Cap) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	if err := budget.ValidateName(team); err != nil {
		return err
	}
	var raw []byte
	if c != nil {
		if err := c.Validate(); err != nil {
			return err
		}
		raw, _ = json.Marshal(c)
	}
	err := l.db.Update(func(tx *bbolt.Tx) error {
		if raw == nil {
			return tx.Bucket(capsBucket).Delete([]byte(team))
		}
		return tx.Bucket(capsBucket).Put([]byte(team), raw)
	})
	if err != nil {
		return fmt.Errorf("boltledger: set budget of team %q: %w", team, err)
	}
	return nil
}
