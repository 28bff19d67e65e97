package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

func openTestDB(tb testing.TB) *bbolt.DB {
	tb.Helper()
	db, err := bbolt.Open(filepath.Join(tb.TempDir(), "stint.db"), 0o600, nil)
	require.NoError(tb, err)
	tb.Cleanup(func() { db.Close() })
	return db
}

// fillStore writes a journal (an invented glossary team and a lab team)
// into DIR/stint.db and closes it, as a stopped proxy would leave it.
func fillStore(t *testing.T, now time.Time) string {
	t.Helper()
	dir := t.TempDir()
	db, err := bbolt.Open(filepath.Join(dir, "stint.db"), 0o600, nil)
	require.NoError(t, err)
	defer db.Close()
	l, err := boltledger.New(db, boltledger.Options{})
	require.NoError(t, err)
	ctx := context.Background()
	entries := []budget.Entry{
		{Time: now.Add(-time.Hour), Team: "lab", Model: "quill-small", Run: "r1", InputTokens: 100, OutputTokens: 50, Cost: 125_000, Outcome: budget.Miss, Upstream: true},
		{Time: now.Add(-50 * time.Minute), Team: "lab", Model: "quill-small", Run: "r1", InputTokens: 100, OutputTokens: 50, Saved: 125_000, Outcome: budget.Hit},
		{Time: now.Add(-40 * time.Minute), Team: "lab", Model: "quill-large", InputTokens: 10, OutputTokens: 5, Cost: 90_000, Outcome: budget.Bypass, Upstream: true},
		{Time: now.Add(-30 * time.Minute), Team: "glossary", Model: "quill-small", InputTokens: 7, Cost: 3_500, Outcome: budget.Miss, Upstream: true},
		{Time: now.Add(-20 * 24 * time.Hour), Team: "lab", Model: "quill-small", InputTokens: 1, Cost: 1_000_000_000, Outcome: budget.Miss, Upstream: true},
	}
	for _, e := range entries {
		require.NoError(t, l.Append(ctx, e))
	}
	// A reservation settled through the ledger, for the budget-left column.
	res, err := l.Reserve(ctx, now, budget.Request{Team: "lab", Amount: 215_000, Caps: budget.Caps{Team: &budget.Cap{Limit: 25 * budget.NanosPerUSD, Period: budget.Month}}, Lease: time.Minute})
	require.NoError(t, err)
	_, err = l.Settle(ctx, now, res, 215_000)
	require.NoError(t, err)
	return dir
}

func runStatementCmd(t *testing.T, args ...string) (string, error) {
	t.Helper()
	cmd := newStatementCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetErr(&out)
	cmd.SetArgs(args)
	err := cmd.Execute()
	return out.String(), err
}

func TestStatementJSON(t *testing.T) {
	dir := fillStore(t, time.Now())
	tests := []struct {
		name      string
		args      []string
		wantRows  map[string]statementRow
		wantTotal string
	}{
		{"by model, 7d", []string{"--by", "model"}, map[string]statementRow{
			// hand-summed from fillStore: the 20-day-old entry is left out
			"quill-small": {Requests: 3, UpstreamCalls: 2, CacheShare: 1.0 / 3, InputTokens: 207, OutputTokens: 100, SpentUSD: "0.0001285", SavedUSD: "0.000125"},
			"quill-large": {Requests: 1, UpstreamCalls: 1, InputTokens: 10, OutputTokens: 5, SpentUSD: "0.00009", SavedUSD: "0.00"},
		}, "0.0002185"},
		{"team lab by run", []string{"--team", "lab", "--by", "run"}, map[string]statementRow{
			"r1": {Requests: 2, UpstreamCalls: 1, CacheShare: 0.5, InputTokens: 200, OutputTokens: 100, SpentUSD: "0.000125", SavedUSD: "0.000125"},
			"":   {Requests: 1, UpstreamCalls: 1, InputTokens: 10, OutputTokens: 5, SpentUSD: "0.00009", SavedUSD: "0.00"},
		}, "0.000215"},
		{"since 30d", []string{"--since", "30d", "--by", "team"}, map[string]statementRow{
			"lab":      {Requests: 4, UpstreamCalls: 3, CacheShare: 0.25, InputTokens: 211, OutputTokens: 105, SpentUSD: "1.000215", SavedUSD: "0.000125"},
			"glossary": {Requests: 1, UpstreamCalls: 1, InputTokens: 7, SpentUSD: "0.0000035", SavedUSD: "0.00"},
		}, "1.0002185"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			out, err := runStatementCmd(t, append([]string{"--data", dir, "--json"}, tt.args...)...)
			require.NoError(t, err, "%v\n%s", err, out)
			var rep statement
			err = json.Unmarshal([]byte(out), &rep)
			require.NoError(t, err, "%v\n%s", err, out)
			require.Len(t, rep.Rows, len(tt.wantRows), "rows")
			for _, r := range rep.Rows {
				want := tt.wantRows[r.Group]
				want.Group = r.Group
				assert.Equal(t, want, r, "row %+v, want %+v", r, want)
			}
			assert.Equal(t, tt.wantTotal, rep.Total.SpentUSD, "total spent %s, want %s", rep.Total.SpentUSD, tt.wantTotal)
		})
	}
}

func TestStatementTableWithBudgetLeft(t *testing.T) {
	dir := fillStore(t, time.Now())
	cfgPath := filepath.Join(t.TempDir(), "stint.yaml")
	cfg := "data: " + dir + "\n" + teamKey + "    budget: {usd: 25.00, per: month}\n"
	require.NoError(t, os.WriteFile(cfgPath, []byte(cfg), 0o600))
	out, err := runStatementCmd(t, "--config", cfgPath, "--by", "team")
	require.NoError(t, err, "%v\n%s", err, out)
	// 25.00 minus the 0.000215 settled in fillStore = 24.999785.
	for _, want := range []string{"TEAM", "SPENT USD", "glossary", "0.0000035", "total", "0.0002185", "33.3%", "24.999785", "provider's bill is the record"} {
		assert.Contains(t, out, want, "output lacks %q:\n%s", want, out)
	}
}

func TestStatementRefusesLockedStore(t *testing.T) {
	dir := fillStore(t, time.Now())
	// Hold the file lock as a running proxy does (bbolt's flock is per
	// open file, so this conflicts within one process too).
	db, err := bbolt.Open(filepath.Join(dir, "stint.db"), 0o600, nil)
	require.NoError(t, err)
	defer db.Close()
	_, err = runStatementCmd(t, "--data", dir)
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "locked") || !strings.Contains(err.Error(), "stint serve"), "got %v, want an error saying the store is locked by stint serve", err)
}

func TestStatementErrors(t *testing.T) {
	dir := fillStore(t, time.Now())
	tests := []struct {
		args []string
		want string
	}{
		{[]string{"--data", t.TempDir()}, "no store"},
		{[]string{"--data", dir, "--by", "week"}, "grouping"},
		{[]string{"--data", dir, "--since", "soon"}, "--since"},
	}
	for _, tt := range tests {
		_, err := runStatementCmd(t, tt.args...)
		assert.Falsef(t, err == nil || !strings.Contains(err.Error(), tt.want), "%v: got %v, want an error mentioning %q", tt.args, err, tt.want)
	}
}

func TestParseSince(t *testing.T) {
	now := time.Date(2026, 12, 10, 12, 0, 0, 0, time.UTC)
	tests := []struct {
		in   string
		want time.Time
	}{
		{"7d", now.Add(-7 * 24 * time.Hour)},
		{"12h", now.Add(-12 * time.Hour)},
		{"30m", now.Add(-30 * time.Minute)},
		{"1h30m", now.Add(-90 * time.Minute)},
		{"1.5d", now.Add(-36 * time.Hour)},
		{"2026-12-01", time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC)},
	}
	for _, tt := range tests {
		got, err := parseSince(tt.in, now)
		assert.Falsef(t, err != nil || !got.Equal(tt.want), "parseSince(%q) = %v, %v; want %v", tt.in, got, err, tt.want)
	}
	for _, in := range []string{"", "-3d", "-1h", "7days", "d"} {
		_, err := parseSince(in, now)
		assert.Error(t, err, "parseSince(%q): want an error", in)
	}
}
