package redisledger_test

import (
	"context"
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/ledgertest"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
)

// replicatedCluster starts a real cluster of three primaries with a
// replica each, failing a primary over after a second.
func replicatedCluster(t *testing.T) *redistest.Cluster {
	return redistest.StartClusterWith(t, redistest.ClusterOptions{Masters: 3, Replicas: 1, NodeTimeout: time.Second})
}

// TestConformanceReplicatedCluster runs the conformance suite with every
// write confirmed by a replica (the script and WAIT on one connection to
// the slot's primary).
func TestConformanceReplicatedCluster(t *testing.T) {
	c := replicatedCluster(t).Client(t)
	var n atomic.Int64
	ledgertest.Run(t, func(t *testing.T, loc *time.Location) func() ledgertest.Store {
		prefix := fmt.Sprintf("repl%d", n.Add(1))
		return func() ledgertest.Store {
			return redisledger.New(c, redisledger.Options{Prefix: prefix, Location: loc, Replicas: 1})
		}
	})
}

// settleEventually settles res at actual, retrying while no replica
// confirms it (bounded).
func settleEventually(t *testing.T, l *redisledger.Ledger, now time.Time, res budget.Reservation, actual budget.Nanos) budget.Settlement {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for {
		st, err := l.Settle(context.Background(), now, res, actual)
		if err == nil {
			return st
		}
		require.ErrorIs(t, err, redisledger.ErrNotReplicated)
		require.True(t, time.Now().Before(deadline), "settlement still not confirmed: %v", err)
		time.Sleep(50 * time.Millisecond) // retry interval
	}
}

// TestReplicasConfirmHolds checks that a ledger with Replicas counts a
// reservation only once a replica has it. With the team's replica stopped
// (SIGSTOP), such a ledger refuses the reservation as in doubt and not
// replicated, while a ledger without the wait takes it on the primary
// alone. Then, with the primary's link to its replica cut just before each
// reservation, a reservation the waiting ledger admits is still held after
// the primary is SIGKILLed and its replica has taken over: a failover does
// not lose it (without the wait it would, the replica never having had it).
func TestReplicasConfirmHolds(t *testing.T) {
	cl := replicatedCluster(t)
	c := cl.Client(t)
	ctx := context.Background()
	now := time.Now()
	req := budget.Request{Team: "lab", Amount: 1000, Caps: budget.Caps{Team: &budget.Cap{Limit: 1_000_000, Period: budget.Total}}, Lease: time.Hour}
	waiting := redisledger.New(c, redisledger.Options{Replicas: 1, ReplicaWait: 600 * time.Millisecond})
	trusting := redisledger.New(c, redisledger.Options{})
	res, err := waiting.Reserve(ctx, now, req)
	require.NoError(t, err, "with the replica up")
	settleEventually(t, waiting, now, res, 0)

	replicas := cl.ReplicasOf(t, "{lab}")
	require.Len(t, replicas, 1)
	replicas[0].Pause(t)
	_, err = waiting.Reserve(ctx, now, req)
	var doubt *budget.InDoubtError
	require.ErrorAs(t, err, &doubt, "reserve with the replica stopped")
	assert.ErrorIs(t, err, redisledger.ErrNotReplicated)
	alone, err := trusting.Reserve(ctx, now, req)
	assert.NoError(t, err, "without the wait, the primary alone takes it")
	replicas[0].Resume(t)
	settleEventually(t, waiting, now, doubt.Reservation, 0)
	if err == nil {
		settleEventually(t, waiting, now, alone, 0)
	}
	bal, err := waiting.Balance(ctx, now, budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Equal(t, budget.Balance{}, bal, "after the releases")

	primary := cl.MasterOf(t, "{lab}")
	pc := redis.NewClient(&redis.Options{Addr: primary.Addr})
	defer pc.Close()
	var held budget.Reservation
	for attempt := 0; ; attempt++ {
		require.Less(t, attempt, 30, "no reservation confirmed while the replica link was being cut")
		// The replica reconnects within a second (its replication cron)
		// and catches up from the primary's backlog.
		require.NoError(t, pc.ClientKillByFilter(ctx, "TYPE", "replica").Err())
		r, err := waiting.Reserve(ctx, now, req)
		if err == nil {
			held = r
			break
		}
		require.ErrorAs(t, err, &doubt)
		settleEventually(t, waiting, now, doubt.Reservation, 0)
	}
	primary.Stop()
	cl.AwaitHealthy(t)
	after := redisledger.New(cl.Client(t), redisledger.Options{Replicas: 1})
	bal, err = after.Balance(ctx, now, budget.Scope{Team: "lab"}, budget.Total)
	require.NoError(t, err)
	assert.Equal(t, budget.Balance{Held: req.Amount}, bal, "the admitted reservation after the failover")
	st, err := after.Settle(ctx, now, held, 400)
	require.NoError(t, err)
	assert.Equal(t, budget.Nanos(400), st.Charged)
}

// TestHeldUntil checks TeamHolds: how many holds a team has and the latest
// lease deadline among them.
func TestHeldUntil(t *testing.T) {
	l := redisledger.New(redistest.Start(t).Client(t), redisledger.Options{})
	ctx := context.Background()
	now := time.Date(2026, 12, 1, 9, 0, 0, 0, time.UTC)
	h, err := l.TeamHolds(ctx, "lab")
	require.NoError(t, err)
	assert.Equal(t, budget.Holds{}, h, "no holds")
	var last budget.Reservation
	for i, lease := range []time.Duration{time.Minute, 3 * time.Minute, 2 * time.Minute} {
		res, err := l.Reserve(ctx, now, budget.Request{Team: "lab", Amount: budget.Nanos(10 + i), Lease: lease})
		require.NoError(t, err)
		if i == 1 {
			last = res
		}
	}
	_, err = l.Reserve(ctx, now, budget.Request{Team: "other", Amount: 5, Lease: time.Hour})
	require.NoError(t, err)
	h, err = l.TeamHolds(ctx, "lab")
	require.NoError(t, err)
	assert.Equal(t, 3, h.Count)
	assert.True(t, h.Until.Equal(now.Add(3*time.Minute)), "until %v, want %v", h.Until, now.Add(3*time.Minute))
	_, err = l.Settle(ctx, now, last, 0)
	require.NoError(t, err)
	h, err = l.TeamHolds(ctx, "lab")
	require.NoError(t, err)
	assert.Equal(t, 2, h.Count)
	assert.True(t, h.Until.Equal(now.Add(2*time.Minute)), "until %v after settling the longest, want %v", h.Until, now.Add(2*time.Minute))
}

// BenchmarkReserveSettleReplicated measures a reservation and its
// settlement on a real cluster with a replica per primary, with and without
// waiting for the replica (WAIT after each script), alternating the two in
// one loop so that both see the same load on this shared machine; it
// reports each one's time and their ratio.
func BenchmarkReserveSettleReplicated(b *testing.B) {
	cl := redistest.StartClusterWith(b, redistest.ClusterOptions{Masters: 3, Replicas: 1})
	c := cl.Client(b)
	now := time.Now()
	caps := budget.Caps{Team: &budget.Cap{Limit: budget.MaxNanos, Period: budget.Month}}
	plain := redisledger.New(c, redisledger.Options{Prefix: "plain"})
	waiting := redisledger.New(c, redisledger.Options{Prefix: "waiting", Replicas: 1})
	var took [2]time.Duration
	for b.Loop() {
		for i, l := range []*redisledger.Ledger{plain, waiting} {
			start := time.Now()
			reserveSettle(b, l, now, caps)
			took[i] += time.Since(start)
		}
	}
	n := float64(b.N)
	b.ReportMetric(float64(took[0].Microseconds())/n, "µs/plain")
	b.ReportMetric(float64(took[1].Microseconds())/n, "µs/replicated")
	b.ReportMetric(float64(took[1])/float64(took[0]), "replicated/plain")
}
