package redisledger_test

import (
	"context"
	"errors"
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/ledgertest"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/internal/redistest"
)

// suite runs the conformance suite on c, giving each test its own prefix
// so that tests share the server but no data.
func suite(t *testing.T, c redis.UniversalClient) {
	var n atomic.Int64
	ledgertest.Run(t, func(t *testing.T, loc *time.Location) func() ledgertest.Store {
		prefix := fmt.Sprintf("test%d", n.Add(1))
		return func() ledgertest.Store {
			return redisledger.New(c, redisledger.Options{Prefix: prefix, Location: loc})
		}
	})
}

func TestConformance(t *testing.T) {
	suite(t, redistest.Start(t).Client(t))
}

// TestConformanceCluster runs the suite on a real 3-master Redis Cluster:
// teams' keys land on different nodes, and Redis rejects any script whose
// keys span hash slots (CROSSSLOT).
func TestConformanceCluster(t *testing.T) {
	c := redistest.StartCluster(t, 3).Client(t)
	// The cluster must refuse a script over two slots, or this test proves
	// nothing about the layout.
	err := c.Eval(context.Background(), "return 1", []string{"x:{a}", "x:{b}"}).Err()
	require.Error(t, err, "EVAL over two slots")
	require.Contains(t, err.Error(), "CROSSSLOT", "EVAL over two slots")
	suite(t, c)
}

// TestSeparateClients has three ledgers with their own connections to one
// Redis, as three proxy processes would, share one budget.
func TestSeparateClients(t *testing.T) {
	srv := redistest.Start(t)
	ledgertest.Run(t, func(t *testing.T, loc *time.Location) func() ledgertest.Store {
		prefix := fmt.Sprintf("sep-%s", t.Name())
		return func() ledgertest.Store {
			return redisledger.New(srv.Client(t), redisledger.Options{Prefix: prefix, Location: loc})
		}
	})
}

// TestUnreachable checks a ledger fails closed: with Redis down, Reserve
// reports an error that is not ErrExhausted, so the proxy answers 503 and
// forwards nothing.
func TestUnreachable(t *testing.T) {
	srv := redistest.Start(t)
	c := redis.NewClient(&redis.Options{Addr: srv.Addr, MaxRetries: -1, DialTimeout: time.Second})
	defer c.Close()
	l := redisledger.New(c, redisledger.Options{})
	ctx := context.Background()
	_, err := l.Reserve(ctx, time.Now(), budget.Request{Team: "lab", Amount: 1, Lease: time.Minute})
	require.NoError(t, err, "Reserve while up")
	if err := c.Do(ctx, "SHUTDOWN", "NOSAVE").Err(); err != nil && !errors.Is(err, redis.ErrClosed) && err.Error() != "EOF" {
		t.Logf("SHUTDOWN: %v", err)
	}
	_, err = l.Reserve(ctx, time.Now(), budget.Request{Team: "lab", Amount: 1, Lease: time.Minute})
	require.Error(t, err, "Reserve with Redis down: want a connection error")
	require.NotErrorIs(t, err, budget.ErrExhausted, "Reserve with Redis down: want a connection error")
}

func BenchmarkReserveSettle(b *testing.B) {
	c := redistest.Start(b).Client(b)
	l := redisledger.New(c, redisledger.Options{})
	now := time.Now()
	caps := budget.Caps{Team: &budget.Cap{Limit: budget.MaxNanos, Period: budget.Month}}
	for _, global := range []bool{false, true} {
		b.Run(fmt.Sprintf("global=%v", global), func(b *testing.B) {
			caps := caps
			if global {
				caps.Global = &budget.Cap{Limit: budget.MaxNanos, Period: budget.Month}
			}
			for b.Loop() {
				reserveSettle(b, l, now, caps)
			}
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "reserve+settle/s")
		})
	}
	b.Run("parallel64", func(b *testing.B) {
		b.SetParallelism(32) // 64 goroutines on 2 cores
		b.RunParallel(func(pb *testing.PB) {
			for pb.Next() {
				reserveSettle(b, l, now, caps)
			}
		})
		b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "reserve+settle/s")
	})
}

func reserveSettle(b *testing.B, l *redisledger.Ledger, now time.Time, caps budget.Caps) {
	ctx := context.Background()
	res, err := l.Reserve(ctx, now, budget.Request{Team: "lab", Key: "k1", Amount: 1000, Caps: caps, Lease: time.Minute})
	if err != nil {
		b.Fatal(err)
	}
	if _, err := l.Settle(ctx, now, res, 500); err != nil {
		b.Fatal(err)
	}
}
