package guard_test

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
)

// retryUntilSettled runs RetryUnsettled until nothing is left (bounded).
func retryUntilSettled(t *testing.T, g *guard.Guard) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for {
		left, err := g.RetryUnsettled(context.Background())
		if left == 0 {
			require.NoError(t, err)
			return
		}
		require.True(t, time.Now().Before(deadline), "%d settlements still queued: %v", left, err)
		time.Sleep(100 * time.Millisecond) // retry interval
	}
}

// TestSettlementsOutlastAFailover admits three calls on a real Redis
// Cluster of three primaries with a replica each, SIGKILLs the primary of
// the team's slot, and only then ends the calls: one answered, one failed
// after it was sent, one never sent. The ledger cannot be reached, so each
// ticket answers with the charge it will make and queues it; once the
// replica has taken over, the retries charge exactly what the calls cost
// (not their reservations) and release the rest, so nothing stays held.
func TestSettlementsOutlastAFailover(t *testing.T) {
	cl := redistest.StartClusterWith(t, redistest.ClusterOptions{Masters: 3, Replicas: 1, NodeTimeout: time.Second})
	c := redis.NewClusterClient(&redis.ClusterOptions{Addrs: cl.Addrs, DialerRetries: 1, ClusterStateReloadInterval: 200 * time.Millisecond})
	defer c.Close()
	l := redisledger.New(c, redisledger.Options{Replicas: 1})
	clk := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
	g, err := guard.New(cfg, l, l, &ratelimit.Local{}, clk.Now)
	require.NoError(t, err)
	ctx := context.Background()
	var tickets []*guard.Ticket
	for range 3 {
		tk, err := g.Admit(ctx, helloCall())
		require.NoError(t, err)
		tickets = append(tickets, tk)
	}
	reserved := tickets[0].Reserved() // 2 prompt tokens and 2 × 100 output tokens: 301,000

	cl.MasterOf(t, "{glossary}").Stop()
	answered := budget.Nanos(2*inPerToken + 37*outPerToken) // 56,500
	ch, err := tickets[0].Settle(ctx, guard.Usage{PromptTokens: 2, CompletionTokens: 37}, budget.Miss)
	require.NoError(t, err)
	assert.Equal(t, answered, ch.Cost, "the answered call is charged what it cost")
	assert.True(t, ch.Deferred, "answered call's charge %+v", ch)
	ch, err = tickets[1].Fail(ctx, true)
	require.NoError(t, err)
	assert.True(t, ch.Deferred, "failed call's charge %+v", ch)
	assert.Equal(t, reserved, ch.Cost, "a call that may have been billed is charged its reservation")
	require.NoError(t, tickets[2].Cancel(ctx))
	assert.Equal(t, 3, g.Unsettled())
	left, err := g.RetryUnsettled(ctx)
	assert.Equal(t, 3, left, "retried while the primary is down")
	assert.Error(t, err)

	cl.AwaitHealthy(t)
	retryUntilSettled(t, g)
	b := balance(t, l, clk.Now(), budget.Scope{Team: "glossary"})
	assert.Equal(t, budget.Balance{Spent: answered + reserved}, b, "after the failover")
	h, err := l.TeamHolds(ctx, "glossary")
	require.NoError(t, err)
	assert.Equal(t, budget.Holds{}, h)
	rows := report(t, l, budget.ByTeam)
	require.Len(t, rows, 1)
	assert.Equal(t, answered+reserved, rows[0].Spent, "the journal's total")
	assert.Equal(t, int64(2), rows[0].UpstreamCalls)
}

// TestReservationInDoubtIsReleased stops (SIGSTOP) the Redis under a
// ledger while a reservation is on its way: the client gives up waiting for
// the answer, so the call is refused, but the script is in the server's
// socket and runs once the server goes on, leaving a hold that no call
// owns. The guard queued its release, and the retry removes it.
func TestReservationInDoubtIsReleased(t *testing.T) {
	srv := redistest.Start(t)
	c := redis.NewClient(&redis.Options{Addr: srv.Addr, MaxRetries: -1, ReadTimeout: 200 * time.Millisecond, WriteTimeout: 200 * time.Millisecond})
	defer c.Close()
	l := redisledger.New(c, redisledger.Options{})
	clk := newClock()
	cfg := baseConfig()
	cfg.Teams = map[string]guard.TeamPolicy{"glossary": {Budget: &budget.Cap{Limit: usd(t, 1), Period: budget.Month}}}
	g, err := guard.New(cfg, l, l, &ratelimit.Local{}, clk.Now)
	require.NoError(t, err)
	ctx := context.Background()
	tk, err := g.Admit(ctx, helloCall()) // the team is known to the ledger from here on
	require.NoError(t, err)
	reserved := tk.Reserved()
	require.NoError(t, tk.Cancel(ctx))

	srv.Pause(t)
	_, err = g.Admit(ctx, helloCall())
	srv.Resume(t)
	require.Error(t, err, "admitted while Redis was stopped")
	var ex *budget.ExhaustedError
	require.False(t, errors.As(err, &ex), "refused as exhausted: %v", err)
	assert.Equal(t, 1, g.Unsettled(), "the reservation in doubt is queued for release")
	deadline := time.Now().Add(5 * time.Second)
	for balance(t, l, clk.Now(), budget.Scope{Team: "glossary"}).Held != reserved {
		require.True(t, time.Now().Before(deadline), "the server never ran the reservation in doubt")
		time.Sleep(20 * time.Millisecond) // polling interval
	}
	retryUntilSettled(t, g)
	assert.Equal(t, budget.Balance{}, balance(t, l, clk.Now(), budget.Scope{Team: "glossary"}), "after the release")
}
