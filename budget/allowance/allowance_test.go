package allowance_test

import (
	"context"
	"errors"
	"path/filepath"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/allowance"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/budget/redistest"
)

func nanos(t *testing.T, usd float64) budget.Nanos {
	t.Helper()
	n, err := budget.FromUSD(usd)
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// TestOutageSpendsAllowanceThenCarriesOver stops the shared Redis: calls
// are admitted on the local allowance until it is used up (then refused as
// a store failure, not as a spent budget); once Redis is back, Expire
// carries every local charge and journal entry over, so the shared ledger
// and journal hold all that was spent.
func TestOutageSpendsAllowanceThenCarriesOver(t *testing.T) {
	ctx := context.Background()
	rs := redistest.Start(t)
	client := redis.NewClient(&redis.Options{Addr: rs.Addr, DialTimeout: 200 * time.Millisecond, ReadTimeout: 200 * time.Millisecond, MaxRetries: -1})
	defer client.Close()
	shared := redisledger.New(client, redisledger.Options{})
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "local.db"), 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	// A fake clock: the ledger's retry window and leases follow it.
	now := time.Date(2026, 12, 2, 10, 0, 0, 0, time.UTC)
	l, err := allowance.New(shared, db, allowance.Options{Allowance: budget.Cap{Limit: nanos(t, 0.010), Period: budget.Day}, Retry: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	teamCap := &budget.Cap{Limit: nanos(t, 1), Period: budget.Total}
	call := func(amount, actual budget.Nanos) error {
		res, err := l.Reserve(ctx, now, budget.Request{Team: "lab", Key: "k1", Amount: amount, Caps: budget.Caps{Team: teamCap}, Lease: time.Minute})
		if err != nil {
			return err
		}
		_, err = l.SettleAndAppend(ctx, now, res, actual, budget.Entry{Time: now, Team: "lab", KeyID: "k1", Model: "quill-small", Outcome: budget.Miss, Upstream: true})
		return err
	}
	unit := nanos(t, 0.003)
	if err := call(unit, unit); err != nil {
		t.Fatalf("call with Redis up: %v", err)
	}

	rs.Stop()
	var admitted int
	for range 5 {
		now = now.Add(time.Millisecond)
		err := call(unit, unit-1000)
		if err == nil {
			admitted++
			continue
		}
		if errors.Is(err, budget.ErrExhausted) {
			t.Fatalf("an exhausted allowance must read as a store failure, not a spent budget: %v", err)
		}
	}
	// 0.010 USD of allowance holds three 0.003 reservations (hand-worked).
	if admitted != 3 {
		t.Fatalf("%d calls admitted on the allowance, want 3", admitted)
	}
	if n, _ := l.Pending(); n != 3 {
		t.Errorf("%d carries pending, want 3", n)
	}

	rs.Restart(t)                  // comes back empty: only the carried charges will be there
	now = now.Add(2 * time.Second) // past the retry window
	if _, err := l.Expire(ctx, now); err != nil {
		t.Fatalf("expire and carry over: %v", err)
	}
	if n, _ := l.Pending(); n != 0 {
		t.Errorf("%d carries still pending after Redis came back", n)
	}
	b, err := l.Balance(ctx, now, budget.Scope{Team: "lab"}, budget.Total)
	if err != nil {
		t.Fatal(err)
	}
	if want := 3 * (unit - 1000); b.Spent != want || b.Held != 0 {
		t.Errorf("shared ledger after carry-over: spent %d held %d, want %d held 0", b.Spent, b.Held, want)
	}
	var entries int
	var cost budget.Nanos
	if err := l.Scan(ctx, time.Time{}, "lab", func(e budget.Entry) error { entries++; cost += e.Cost; return nil }); err != nil {
		t.Fatal(err)
	}
	if entries != 3 || cost != 3*(unit-1000) {
		t.Errorf("shared journal after carry-over: %d entries costing %d, want 3 costing %d", entries, cost, 3*(unit-1000))
	}
}
