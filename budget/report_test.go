package budget_test

import (
	"context"
	"path/filepath"
	"testing"
	"time"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// journal opens a real embedded journal in a temporary file.
func journal(t *testing.T) budget.Journal {
	t.Helper()
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, nil)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	l, err := boltledger.New(db, boltledger.Options{})
	if err != nil {
		t.Fatal(err)
	}
	return l
}

func TestReportBadGrouping(t *testing.T) {
	if _, err := budget.Report(context.Background(), journal(t), budget.Query{By: "week"}); err == nil {
		t.Error("Report by week: want an error")
	}
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
		if got := tt.row.CacheShare(); got != tt.want {
			t.Errorf("%+v.CacheShare() = %v, want %v", tt.row, got, tt.want)
		}
	}
}

func TestReportDayInZone(t *testing.T) {
	j := journal(t)
	at := time.Date(2026, 12, 1, 20, 0, 0, 0, time.UTC)
	if err := j.Append(context.Background(), budget.Entry{Time: at, Team: "lab", Cost: 5, Outcome: budget.Miss, Upstream: true}); err != nil {
		t.Fatal(err)
	}
	rows, err := budget.Report(context.Background(), j, budget.Query{By: budget.ByDay, Location: time.FixedZone("east", 9*3600)})
	if err != nil || len(rows) != 1 || rows[0].Group != "2026-12-02" {
		t.Errorf("Report by day in UTC+9 = %+v, %v; want one row for 2026-12-02", rows, err)
	}
}
