package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// spendFlags are the command-line settings of `stint spend`.
type spendFlags struct {
	data   string
	config string
	team   string
	since  string
	by     string
	json   bool
}

// spendLockTimeout bounds the wait for the store's file lock.
const spendLockTimeout = time.Second

func newSpendCmd() *cobra.Command {
	var f spendFlags
	cmd := &cobra.Command{
		Use:   "spend",
		Short: "Report what was spent and what the cache saved",
		Long: `Print spend from the journal in the embedded store (DATA/stint.db): per
group, the requests, upstream calls, share served from the cache, tokens,
USD spent and USD saved. With --config, each team's budget left this period
is shown too.

Costs are estimates from the configured prices and the upstream's usage
counts; the provider's bill is the record.

The store file is locked while stint serve runs; stop it first (or read
spend from the proxy's admin endpoint).`,
		Example: `  stint spend --data ./stint-data --since 7d
  stint spend --config stint.yaml --team lab --by model
  stint spend --by day --since 30d --json`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runSpend(cmd.Context(), cmd.OutOrStdout(), f, time.Now())
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.data, "data", "", "data directory holding stint.db (default: the config's data, else ./stint-data)")
	fl.StringVar(&f.config, "config", "", "YAML config file; adds each team's budget left")
	fl.StringVar(&f.team, "team", "", "only this team")
	fl.StringVar(&f.since, "since", "7d", "how far back: 30m, 12h, 7d, or a date 2026-12-01 (UTC)")
	fl.StringVar(&f.by, "by", "team", "group by model, team, run or day")
	fl.BoolVar(&f.json, "json", false, "print JSON instead of a table")
	return cmd
}

// parseSince reads "7d", "12h", "30m" (any Go duration, plus days) or a
// date, and returns the time that far before now.
func parseSince(s string, now time.Time) (time.Time, error) {
	s = strings.TrimSpace(s)
	if d, err := time.Parse(time.DateOnly, s); err == nil {
		return d, nil
	}
	if days, ok := strings.CutSuffix(s, "d"); ok {
		n, err := strconv.ParseFloat(days, 64)
		if err == nil && n >= 0 && n <= 365*1000 {
			return now.Add(-time.Duration(n * 24 * float64(time.Hour))), nil
		}
	} else if d, err := time.ParseDuration(s); err == nil && d >= 0 {
		return now.Add(-d), nil
	}
	return time.Time{}, fmt.Errorf("--since %q: want a span like 30m, 12h or 7d, or a date like 2026-12-01", s)
}

// spendReport is the JSON form of the output.
type spendReport struct {
	Since   time.Time    `json:"since"`
	By      string       `json:"by"`
	Rows    []spendRow   `json:"rows"`
	Total   spendRow     `json:"total"`
	Budgets []budgetLeft `json:"budgets,omitempty"`
}

type spendRow struct {
	Group         string  `json:"group"`
	Requests      int64   `json:"requests"`
	UpstreamCalls int64   `json:"upstream_calls"`
	CacheShare    float64 `json:"cache_share"`
	InputTokens   int64   `json:"input_tokens"`
	OutputTokens  int64   `json:"output_tokens"`
	SpentUSD      string  `json:"spent_usd"` // exact decimal
	SavedUSD      string  `json:"saved_usd"`
}

type budgetLeft struct {
	Team     string `json:"team"`
	Period   string `json:"period"`
	LimitUSD string `json:"limit_usd"`
	SpentUSD string `json:"spent_usd"`
	HeldUSD  string `json:"held_usd"`
	LeftUSD  string `json:"left_usd"`
}

func runSpend(ctx context.Context, out io.Writer, f spendFlags, now time.Time) error {
	var cfg *Config
	if f.config != "" {
		c, err := LoadConfig(f.config)
		if err != nil {
			return err
		}
		cfg = &c
	}
	dir := f.data
	if dir == "" {
		dir = DefaultConfig().Data
		if cfg != nil {
			dir = cfg.Data
		}
	}
	since, err := parseSince(f.since, now)
	if err != nil {
		return err
	}
	by := budget.GroupBy(f.by)
	loc := time.UTC
	if cfg != nil {
		if loc, err = loadZone(cfg.Budget.TimeZone); err != nil {
			return err
		}
	}
	db, err := openStoreForReport(filepath.Join(dir, "stint.db"))
	if err != nil {
		return err
	}
	defer db.Close()
	ledger, err := boltledger.New(db, boltledger.Options{Location: loc})
	if err != nil {
		return err
	}
	rows, err := budget.Report(ctx, ledger, budget.Query{Since: since, Team: f.team, By: by, Location: loc})
	if err != nil {
		return err
	}
	rep := spendReport{Since: since, By: string(by)}
	var total budget.Row
	for _, r := range rows {
		rep.Rows = append(rep.Rows, toSpendRow(r))
		total.Requests += r.Requests
		total.UpstreamCalls += r.UpstreamCalls
		total.CacheHits += r.CacheHits
		total.InputTokens += r.InputTokens
		total.OutputTokens += r.OutputTokens
		total.Spent += r.Spent
		total.Saved += r.Saved
	}
	total.Group = "total"
	rep.Total = toSpendRow(total)
	if cfg != nil {
		for _, t := range cfg.Teams {
			if t.Budget == nil || (f.team != "" && t.Name != f.team) {
				continue
			}
			c, err := capOf(*t.Budget, nil, "teams", t.Name, "budget")
			if err != nil {
				return err
			}
			b, err := ledger.Balance(ctx, now, budget.Scope{Team: t.Name}, c.Period)
			if err != nil {
				return err
			}
			rep.Budgets = append(rep.Budgets, budgetLeft{
				Team: t.Name, Period: string(c.Period), LimitUSD: c.Limit.String(), SpentUSD: b.Spent.String(),
				HeldUSD: b.Held.String(), LeftUSD: max(c.Limit-b.Spent-b.Held, 0).String(),
			})
		}
	}
	if f.json {
		enc := json.NewEncoder(out)
		enc.SetIndent("", "  ")
		return enc.Encode(rep)
	}
	return printSpend(out, rep)
}

func toSpendRow(r budget.Row) spendRow {
	return spendRow{
		Group: r.Group, Requests: r.Requests, UpstreamCalls: r.UpstreamCalls, CacheShare: r.CacheShare(),
		InputTokens: r.InputTokens, OutputTokens: r.OutputTokens, SpentUSD: r.Spent.String(), SavedUSD: r.Saved.String(),
	}
}

func printSpend(out io.Writer, rep spendReport) error {
	w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(w, "%s\tREQUESTS\tUPSTREAM\tCACHED\tTOKENS IN\tTOKENS OUT\tSPENT USD\tSAVED USD\t\n", strings.ToUpper(rep.By))
	for _, r := range append(rep.Rows, rep.Total) {
		g := r.Group
		if g == "" {
			g = "(none)"
		}
		fmt.Fprintf(w, "%s\t%d\t%d\t%.1f%%\t%d\t%d\t%s\t%s\t\n", g, r.Requests, r.UpstreamCalls, 100*r.CacheShare,
			r.InputTokens, r.OutputTokens, r.SpentUSD, r.SavedUSD)
	}
	if err := w.Flush(); err != nil {
		return err
	}
	if len(rep.Budgets) > 0 {
		fmt.Fprintln(out)
		w = tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(w, "TEAM\tPERIOD\tBUDGET USD\tSPENT USD\tHELD USD\tLEFT USD\t")
		for _, b := range rep.Budgets {
			fmt.Fprintf(w, "%s\t%s\t%s\t%s\t%s\t%s\t\n", b.Team, b.Period, b.LimitUSD, b.SpentUSD, b.HeldUSD, b.LeftUSD)
		}
		if err := w.Flush(); err != nil {
			return err
		}
	}
	fmt.Fprintf(out, "\nsince %s. Costs are estimates from configured prices and upstream usage; the provider's bill is the record.\n", rep.Since.Format(time.RFC3339))
	return nil
}

// openStoreForReport opens an existing store file, waiting at most
// spendLockTimeout for its lock. It opens it read-write because the
// journal's buckets are created on first use; it writes nothing else.
func openStoreForReport(path string) (*bbolt.DB, error) {
	if _, err := os.Stat(path); err != nil {
		return nil, fmt.Errorf("no store at %s (give --data DIR, or --config with its data directory): %w", path, err)
	}
	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: spendLockTimeout})
	if errors.Is(err, bbolt.ErrTimeout) {
		return nil, fmt.Errorf("the store %s is locked by another process, most likely a running `stint serve`; stop it to read spend from the file, or query the proxy's admin endpoint", path)
	}
	if err != nil {
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	return db, nil
}
