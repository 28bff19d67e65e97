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

// TestSweep runs Sweep on the real clock against a real embedded ledger and
// waits (on a channel, bounded by the test's own timeout) for it to charge
// a reservation whose holder never settles.
func TestSweep(t *testing.T) {
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, nil)
	require.NoError(t, err)
	defer db.Close()
	l, err := boltledger.New(db, boltledger.Options{})
	require.NoError(t, err)
	start := time.Now()
	res, err := l.Reserve(context.Background(), start, budget.Request{Team: "lab", Amount: 42, Lease: time.Millisecond,
		Caps: budget.Caps{Team: &budget.Cap{Limit: 100, Period: budget.Total}}})
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	got := make(chan []budget.Reservation, 1)
	done := make(chan error, 1)
	go func() {
		done <- budget.Sweep(ctx, l, 2*time.Millisecond, func(r []budget.Reservation) { got <- r }, func(err error) { assert.NoError(t, err, "Sweep") })
	}()
	expired := <-got
	cancel()
	assert.ErrorIs(t, <-done, context.Canceled, "Sweep returned")
	require.Len(t, expired, 1, "swept")
	require.Equal(t, res.ID, expired[0].ID, "swept")
	b, err := l.Balance(context.Background(), start, budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err, "balance after sweep")
	assert.Equal(t, budget.Balance{Spent: 42}, b, "balance after sweep")
}
