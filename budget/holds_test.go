package budget_test

import (
	"context"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// TestStandingCountsHolds checks that a team's standing says how many of
// its reservations are unsettled and until when they may be held (the
// latest lease deadline), on the embedded ledger, which reports holds.
func TestStandingCountsHolds(t *testing.T) {
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, nil)
	require.NoError(t, err)
	t.Cleanup(func() { db.Close() })
	l, err := boltledger.New(db, boltledger.Options{})
	require.NoError(t, err)
	ctx := context.Background()
	now := time.Date(2026, 12, 1, 9, 0, 0, 0, time.UTC)
	limit := budget.Nanos(1_000_000)
	caps := map[string]budget.Cap{"lab": {Limit: limit, Period: budget.Total}, "depot": {Limit: limit, Period: budget.Total}}
	var first budget.Reservation
	for i, lease := range []time.Duration{time.Minute, 5 * time.Minute, 2 * time.Minute} {
		c := caps["lab"]
		res, err := l.Reserve(ctx, now, budget.Request{Team: "lab", Amount: 1000, Caps: budget.Caps{Team: &c}, Lease: lease})
		require.NoError(t, err)
		if i == 0 {
			first = res
		}
	}
	_, err = l.Settle(ctx, now, first, 400)
	require.NoError(t, err)
	st, err := budget.NewStatement(ctx, l, l, budget.Query{By: budget.ByTeam}, caps, now)
	require.NoError(t, err)
	until := now.Add(5 * time.Minute)
	tests := []struct {
		team  string
		want  budget.Standing
		until *time.Time
	}{
		{"depot", budget.Standing{Team: "depot", Period: budget.Total, LimitUSD: "0.001", SpentUSD: "0.00", HeldUSD: "0.00", LeftUSD: "0.001"}, nil},
		{"lab", budget.Standing{Team: "lab", Period: budget.Total, LimitUSD: "0.001", SpentUSD: "0.0000004", HeldUSD: "0.000002", LeftUSD: "0.0009976", Holds: 2}, &until},
	}
	require.Len(t, st.Budgets, len(tests))
	for i, tt := range tests {
		t.Run(tt.team, func(t *testing.T) {
			got := st.Budgets[i]
			if tt.until == nil {
				assert.Nil(t, got.HeldUntil)
			} else if assert.NotNil(t, got.HeldUntil) {
				assert.True(t, got.HeldUntil.Equal(*tt.until), "held until %v, want %v", got.HeldUntil, tt.until)
			}
			got.HeldUntil = nil
			assert.Equal(t, tt.want, got)
		})
	}
}
