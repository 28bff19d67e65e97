package redisledger_test

import (
	"context"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
)

// TestClockSkewKeepsCaps runs two replicas' ledgers on one Redis with
// clocks an hour apart (far past any skew NTP allows, and past the lease):
// the cap admits exactly what it allows, whichever clock asks; the replica
// ahead expires the other's holds early and charges them in full, never
// less; a holder whose hold was expired early finds it not held and gets no
// refund. What the package doc says skew can change, and no more.
func TestClockSkewKeepsCaps(t *testing.T) {
	c := redistest.Start(t).Client(t)
	behind := redisledger.New(c, redisledger.Options{Prefix: "skew"})
	ahead := redisledger.New(c, redisledger.Options{Prefix: "skew"})
	t0 := time.Date(2026, 6, 15, 12, 0, 0, 0, time.UTC) // mid-month: one period for both clocks
	clocks := []struct {
		l   *redisledger.Ledger
		now time.Time
	}{{behind, t0}, {ahead, t0.Add(time.Hour)}}
	ctx := context.Background()
	caps := budget.Caps{Team: &budget.Cap{Limit: 1000, Period: budget.Month}}
	var held []budget.Reservation
	for i := range 12 {
		r := clocks[i%2]
		res, err := r.l.Reserve(ctx, r.now, budget.Request{Team: "lab", Amount: 100, Caps: caps, Lease: 10 * time.Minute})
		if i < 10 {
			require.NoError(t, err, "reservation %d of 10 that fit", i)
			held = append(held, res)
			continue
		}
		assert.ErrorIs(t, err, budget.ErrExhausted, "reservation %d: past the cap", i)
	}
	// The replica ahead sees the behind one's deadlines (t0 + 10m) in its
	// past: its sweep charges those five holds at their reserved amount.
	expired, err := ahead.Expire(ctx, t0.Add(time.Hour))
	require.NoError(t, err)
	assert.Len(t, expired, 5, "holds the replica ahead expired")
	for i, res := range held {
		r := clocks[i%2]
		_, err := r.l.Settle(ctx, r.now, res, 40)
		if i%2 == 0 {
			assert.ErrorIs(t, err, budget.ErrNotHeld, "settle of hold %d, expired early", i)
		} else {
			assert.NoError(t, err, "settle of hold %d", i)
		}
	}
	b, err := behind.Balance(ctx, t0, budget.Scope{Team: "lab"}, budget.Month)
	require.NoError(t, err)
	assert.Equal(t, budget.Balance{Spent: 5*100 + 5*40}, b, "the early-expired holds charged in full, the others at cost")
	assert.LessOrEqual(t, b.Spent, caps.Team.Limit, "spent within the cap")
}
