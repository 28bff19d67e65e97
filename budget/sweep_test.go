package budget_test

import (
	"context"
	"errors"
	"path/filepath"
	"testing"
	"time"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// TestSweep runs Sweep on the real clock against a real embedded ledger and
// waits (on a channel, bounded by the test's own timeout) for it to charge
// a reservation whose holder never settles.
func TestSweep(t *testing.T) {
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	l, err := boltledger.New(db, boltledger.Options{})
	if err != nil {
		t.Fatal(err)
	}
	start := time.Now()
	res, err := l.Reserve(context.Background(), start, budget.Request{Team: "lab", Amount: 42, Lease: time.Millisecond,
		Caps: budget.Caps{Team: &budget.Cap{Limit: 100, Period: budget.Total}}})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	got := make(chan []budget.Reservation, 1)
	done := make(chan error, 1)
	go func() {
		done <- budget.Sweep(ctx, l, 2*time.Millisecond, func(r []budget.Reservation) { got <- r }, func(err error) { t.Error(err) })
	}()
	expired := <-got
	cancel()
	if err := <-done; !errors.Is(err, context.Canceled) {
		t.Errorf("Sweep returned %v, want context.Canceled", err)
	}
	if len(expired) != 1 || expired[0].ID != res.ID {
		t.Fatalf("swept %+v, want reservation %s", expired, res.ID)
	}
	b, err := l.Balance(context.Background(), start, budget.Scope{Team: "lab"}, budget.Total)
	if err != nil || b != (budget.Balance{Spent: 42}) {
		t.Errorf("balance after sweep = %+v, %v; want 42 spent", b, err)
	}
}
