package boltledger_test

import (
	"context"
	"fmt"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/ledgertest"
)

// openDB opens a fresh bbolt file, closed when tb ends.
func openDB(tb testing.TB) *bbolt.DB {
	tb.Helper()
	db, err := bbolt.Open(filepath.Join(tb.TempDir(), "stint.db"), 0o600, &bbolt.Options{Timeout: 5 * time.Second})
	if err != nil {
		tb.Fatalf("bbolt.Open: %v", err)
	}
	tb.Cleanup(func() { db.Close() })
	return db
}

func newLedger(tb testing.TB, db *bbolt.DB, loc *time.Location) *boltledger.Ledger {
	tb.Helper()
	return newLedgerOpts(tb, db, boltledger.Options{Location: loc})
}

func newLedgerOpts(tb testing.TB, db *bbolt.DB, opts boltledger.Options) *boltledger.Ledger {
	tb.Helper()
	l, err := boltledger.New(db, opts)
	if err != nil {
		tb.Fatalf("New: %v", err)
	}
	return l
}

func TestConformance(t *testing.T) {
	for _, batch := range []bool{false, true} {
		t.Run(fmt.Sprintf("batch=%v", batch), func(t *testing.T) {
			ledgertest.Run(t, func(t *testing.T, loc *time.Location) func() ledgertest.Store {
				db := openDB(t)
				return func() ledgertest.Store {
					return newLedgerOpts(t, db, boltledger.Options{Location: loc, Batch: batch})
				}
			})
		})
	}
}

// TestSharesFile checks the ledger only adds "budget."-prefixed buckets and
// leaves other buckets of the shared file alone.
func TestSharesFile(t *testing.T) {
	db := openDB(t)
	require.NoError(t, db.Update(func(tx *bbolt.Tx) error {
		b, err := tx.CreateBucket([]byte("cache.entries"))
		if err != nil {
			return err
		}
		return b.Put([]byte("k"), []byte("v"))
	}))
	l := newLedger(t, db, nil)
	res, err := l.Reserve(context.Background(), time.Now(), budget.Request{Team: "lab", Amount: 5, Lease: time.Minute})
	require.NoError(t, err, "Reserve")
	_, err = l.Settle(context.Background(), time.Now(), res, 5)
	require.NoError(t, err, "Settle")
	err = db.View(func(tx *bbolt.Tx) error {
		return tx.ForEach(func(name []byte, b *bbolt.Bucket) error {
			n := string(name)
			if n == "cache.entries" {
				assert.Equal(t, "v", string(b.Get([]byte("k"))), "cache bucket value")
				return nil
			}
			assert.True(t, strings.HasPrefix(n, "budget."), "bucket %q lacks the budget. prefix", n)
			return nil
		})
	})
	require.NoError(t, err)
}

// BenchmarkReserveSettle measures one reserve and one settle, each a
// committed (fsynced) bbolt transaction: serially, and from parallel
// goroutines with and without Options.Batch.
func BenchmarkReserveSettle(b *testing.B) {
	caps := budget.Caps{Team: &budget.Cap{Limit: budget.MaxNanos, Period: budget.Month}}
	op := func(b *testing.B, l *boltledger.Ledger) {
		ctx := context.Background()
		now := time.Now()
		res, err := l.Reserve(ctx, now, budget.Request{Team: "lab", Key: "k1", Amount: 1000, Caps: caps, Lease: time.Minute})
		if err != nil {
			b.Fatal(err)
		}
		if _, err := l.Settle(ctx, now, res, 500); err != nil {
			b.Fatal(err)
		}
	}
	b.Run("serial", func(b *testing.B) {
		l := newLedger(b, openDB(b), nil)
		for b.Loop() {
			op(b, l)
		}
		b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "reserve+settle/s")
	})
	for _, batch := range []bool{false, true} {
		b.Run(fmt.Sprintf("parallel64/batch=%v", batch), func(b *testing.B) {
			l := newLedgerOpts(b, openDB(b), boltledger.Options{Batch: batch})
			b.SetParallelism(32) // 64 goroutines on 2 cores
			b.RunParallel(func(pb *testing.PB) {
				for pb.Next() {
					op(b, l)
				}
			})
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "reserve+settle/s")
		})
	}
}
