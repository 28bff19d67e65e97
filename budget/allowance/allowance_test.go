package allowance_test

import (
	"context"
	"errors"
	"path/filepath"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/allowance"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
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

// TestReservationInDoubtIsNotDoubled stops (SIGSTOP) the shared Redis while
// a reservation is on its way, so it may be held there: the ledger returns
// the *budget.InDoubtError for the caller to release, instead of also
// admitting the call on the local allowance; the next call, with the store
// known to be away, goes to the allowance. Once the server goes on, its
// hold is there to release, and holds are reported across both ledgers.
func TestReservationInDoubtIsNotDoubled(t *testing.T) {
	ctx := context.Background()
	rs := redistest.Start(t)
	client := redis.NewClient(&redis.Options{Addr: rs.Addr, ReadTimeout: 200 * time.Millisecond, WriteTimeout: 200 * time.Millisecond, MaxRetries: -1})
	defer client.Close()
	shared := redisledger.New(client, redisledger.Options{})
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "local.db"), 0o600, nil)
	require.NoError(t, err)
	defer db.Close()
	now := time.Date(2026, 12, 2, 10, 0, 0, 0, time.UTC)
	l, err := allowance.New(shared, db, allowance.Options{Allowance: budget.Cap{Limit: nanos(t, 0.010), Period: budget.Day}, Retry: time.Minute})
	require.NoError(t, err)
	req := budget.Request{Team: "lab", Amount: nanos(t, 0.001), Caps: budget.Caps{Team: &budget.Cap{Limit: nanos(t, 1), Period: budget.Total}}, Lease: time.Minute}
	res, err := l.Reserve(ctx, now, req) // the team is known to the shared ledger from here on
	require.NoError(t, err)
	_, err = l.Settle(ctx, now, res, 0)
	require.NoError(t, err)

	rs.Pause(t)
	_, err = l.Reserve(ctx, now, req)
	var doubt *budget.InDoubtError
	require.ErrorAs(t, err, &doubt, "a reservation cut off on its way")
	local, err := l.Reserve(ctx, now, req)
	require.NoError(t, err, "the next one, on the allowance")
	rs.Resume(t)

	deadline := time.Now().Add(5 * time.Second)
	for {
		b, err := shared.Balance(ctx, now, budget.Scope{Team: "lab"}, budget.Total)
		require.NoError(t, err)
		if b.Held == req.Amount {
			break
		}
		require.True(t, time.Now().Before(deadline), "the server never ran the reservation in doubt")
		time.Sleep(20 * time.Millisecond) // polling interval
	}
	h, err := l.TeamHolds(ctx, "lab")
	require.NoError(t, err)
	assert.Equal(t, 2, h.Count, "the shared hold in doubt and the local one")
	_, err = l.Settle(ctx, now, doubt.Reservation, 0)
	require.NoError(t, err, "the release of the hold in doubt")
	_, err = l.Settle(ctx, now, local, 0)
	require.NoError(t, err)
	h, err = l.TeamHolds(ctx, "lab")
	require.NoError(t, err)
	assert.Equal(t, budget.Holds{}, h)
}
