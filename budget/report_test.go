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

// journal opens a real embedded journal in a temporary file.
func journal(t *testing.T) budget.Journal {
	t.Helper()
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, nil)
	require.NoError(t, err)
	t.Cleanup(func() { db.Close() })
	l, err := boltledger.New(db, boltledger.Options{})
	require.NoError(t, err)
	return l
}

func TestReportBadGrouping(t *testing.T) {
	_, err := budget.Report(context.Background(), journal(t), budget.Query{By: "week"})
	assert.Error(t, err, "Report by week")
}

func TestRowCacheShare(t *testing.T) {
	tests := []struct {
		row  budget.Row
		want float64
	}{
		{budget.Row{}, 0},
		{budget.Row{Requests: 4, CacheHits: 1}, 0.25},
	}
	for _, tt := range tests {
		assert.Equal(t, tt.want, tt.row.CacheShare(), "%+v.CacheShare()", tt.row)
	}
}

func TestReportDayInZone(t *testing.T) {
	j := journal(t)
	at := time.Date(2026, 12, 1, 20, 0, 0, 0, time.UTC)
	require.NoError(t, j.Append(context.Background(), budget.Entry{Time: at, Team: "lab", Cost: 5, Outcome: budget.Miss, Upstream: true}))
	rows, err := budget.Report(context.Background(), j, budget.Query{By: budget.ByDay, Location: time.FixedZone("east", 9*3600)})
	require.NoError(t, err, "Report by day in UTC+9")
	require.Len(t, rows, 1, "Report by day in UTC+9")
	assert.Equal(t, "2026-12-02", rows[0].Group, "Report by day in UTC+9")
}
