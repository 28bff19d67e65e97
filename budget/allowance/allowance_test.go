package allowance_test

import (
	"context"
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
	require.NoError(t, err)
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
	require.NoError(t, err)
	defer db.Close()
	// A fake clock: the ledger's retry window and leases follow it.
	now := time.Date(2026, 12, 2, 10, 0, 0, 0, time.UTC)
	l, err := allowance.New(shared, db, allowance.Options{Allowance: budget.Cap{Limit: nanos(t, 0.010), Period: budget.Day}, Retry: time.Second})
	require.NoError(t, err)
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
	require.NoError(t, call(unit, unit), "call with Redis up")

	rs.Stop()
	var admitted int
	for range 5 {
		now = now.Add(time.Millisecond)
		err := call(unit, unit-1000)
		if err == nil {
			admitted++
			continue
		}
		require.NotErrorIs(t, err, budget.ErrExhausted, "an exhausted allowance must read as a store failure, not a spent budget")
	}
	// 0.010 USD of allowance holds three 0.003 reservations (hand-worked).
	require.Equal(t, 3, admitted, "calls admitted on the allowance")
	n, _ := l.Pending()
	assert.Equal(t, 3, n, "carries pending")

	rs.Restart(t)                  // comes back empty: only the carried charges will be there
	now = now.Add(2 * time.Second) // past the retry window
	_, err = l.Expire(ctx, now)
	require.NoError(t, err, "expire and carry over")
	n, _ = l.Pending()
	assert.Zero(t, n, "carries still pending after Redis came back")
	b, err := l.Balance(ctx, now, budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Equal(t, budget.Balance{Spent: 3 * (unit - 1000)}, b, "shared ledger after carry-over")
	var entries int
	var cost budget.Nanos
	require.NoError(t, l.Scan(ctx, time.Time{}, "lab", func(e budget.Entry) error { entries++; cost += e.Cost; return nil }))
	assert.Equal(t, 3, entries, "shared journal entries after carry-over")
	assert.Equal(t, 3*(unit-1000), cost, "shared journal cost after carry-over")
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
