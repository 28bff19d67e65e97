package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"maps"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"
	"go.etcd.io/bbolt"
	bberrors "go.etcd.io/bbolt/errors"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/proxy"
)

// statementFlags are the command-line settings of `stint statement`.
type statementFlags struct {
	data   string
	config string
	team   string
	since  string
	by     string
	json   bool
	remote proxyFlags
}

// storeLockTimeout bounds the wait for the store's file lock.
const storeLockTimeout = time.Second

func newStatementCmd() *cobra.Command {
	f := statementFlags{remote: proxyFlags{admin: true}}
	cmd := &cobra.Command{
		Use:   "statement",
		Short: "Print a statement of what was spent and what the cache saved",
		Long: `Print a statement: per group (team, model, run or day), the requests,
upstream calls, share served from the cache, tokens, USD spent and USD saved,
and each capped team's budget standing.

By default it asks the running proxy (--proxy, its admin endpoint
GET /stint/admin/statement; the admin key is --key or $STINT_ADMIN_KEY, and
a proxy run without a config needs none). With --data or --config it reads
the store instead: the embedded file DATA/stint.db (locked while stint serve
runs on it, so stop it first), or Redis when the config has store.redis;
--config also adds each team's budget left this period.

Only calls made while the proxy's config prices models are recorded: without
prices (spend control off) there is nothing to report.

Costs are estimates from the configured prices and the upstream's usage
counts; the provider's bill is the record.`,
		Example: `  stint statement --since 7d --by model
  STINT_ADMIN_KEY=... stint statement --proxy http://10.0.0.5:8787 --by team --json
  stint statement --data ./stint-data --by run
  stint statement --config stint.yaml --team lab --by day --since 30d`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if (f.data != "" || f.config != "") && cmd.Flags().Changed("proxy") {
				return errors.New("--proxy asks the running proxy, --data and --config read the store: give one or the other")
			}
			return runStatement(cmd.Context(), cmd.OutOrStdout(), f, time.Now())
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.data, "data", "", "read the store in this data directory (its stint.db) instead of asking the proxy")
	fl.StringVar(&f.config, "config", "", "read the store the config names (its data, or store.redis) instead of asking the proxy, and add each team's budget left")
	fl.StringVar(&f.team, "team", "", "only this team")
	fl.StringVar(&f.since, "since", "7d", "how far back: 30m, 12h, 7d, or a date 2026-12-01 (UTC)")
	fl.StringVar(&f.by, "by", "team", "group by model, team, run or day")
	fl.BoolVar(&f.json, "json", false, "print JSON instead of a table")
	f.remote.register(fl)
	describeFlag(fl, "data", "DIR", "")
	describeFlag(fl, "config", "FILE", "")
	describeFlag(fl, "team", "NAME", "")
	describeFlag(fl, "since", "WHEN", "")
	describeFlag(fl, "by", "GROUP", "")
	return cmd
}

// parseSince reads --since; see budget.ParseSince.
func parseSince(s string, now time.Time) (time.Time, error) {
	t, err := budget.ParseSince(s, now)
	if err != nil {
		return time.Time{}, fmt.Errorf("--since %w", err)
	}
	return t, nil
}

// statement is the JSON form of the output.
type statement = budget.Statement

// statementRow is one line of it.
type statementRow = budget.StatementRow

func runStatement(ctx context.Context, out io.Writer, f statementFlags, now time.Time) error {
	if f.data == "" && f.config == "" {
		return runStatementRemote(ctx, out, f)
	}
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
	ledger, closeLedger, err := openReportLedger(ctx, cfg, dir, loc)
	if err != nil {
		return err
	}
	defer closeLedger()
	caps := map[string]budget.Cap{}
	if cfg != nil {
		for _, t := range cfg.Teams {
			if t.Budget == nil {
				continue
			}
			c, err := capOf(*t.Budget, nil, "teams", t.Name, "budget")
			if err != nil {
				return err
			}
			caps[t.Name] = *c
		}
		if ov, ok := ledger.(guard.Overrides); ok {
			set, err := ov.TeamCaps(ctx)
			if err != nil {
				return err
			}
			maps.Copy(caps, set)
		}
	}
	rep, err := budget.NewStatement(ctx, ledger, ledger, budget.Query{Since: since, Team: f.team, By: by, Location: loc}, caps, now)
	if err != nil {
		return err
	}
	return writeStatement(out, rep, f.json)
}

func printStatement(out io.Writer, rep statement) error {
	w := tabwriter.NewWriter(out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(w, "%s\tENTRIES\tUPSTREAM\tENTRIES FROM CACHE\tTOKENS IN\tTOKENS OUT\tSPENT USD\tSAVED USD\t\n", strings.ToUpper(string(rep.By)))
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
	if len(rep.Rows) == 0 {
		fmt.Fprintln(out, "\nnothing recorded in this window: calls are recorded only while the proxy's config prices models (prices: in stint config example)")
	}
	if len(rep.Budgets) > 0 {
		fmt.Fprintln(out)
		if err := printStandings(out, rep.Budgets); err != nil {
			return err
		}
	}
	fmt.Fprintf(out, "\nsince %s. Costs are estimates from configured prices and upstream usage; the provider's bill is the record.\n", rep.Since.Format(time.RFC3339))
	return nil
}

// openStoreForReport opens an existing store file, waiting at most
// storeLockTimeout for its lock. It opens it read-write because the
// journal's buckets are created on first use; it writes nothing else.
// reportLedger is what a statement reads: the journal and the balances.
type reportLedger interface {
	budget.Journal
	Balance(ctx context.Context, now time.Time, scope budget.Scope, p budget.Period) (budget.Balance, error)
}

// openReportLedger opens the ledger the config's proxies write: Redis when
// the config has store.redis, else the embedded file in dir.
func openReportLedger(ctx context.Context, cfg *Config, dir string, loc *time.Location) (reportLedger, func(), error) {
	if cfg != nil && cfg.Store.Redis != nil {
		rc := cfg.Store.Redis
		client, err := rc.client(ctx)
		if err != nil {
			return nil, nil, err
		}
		l := redisledger.New(client, redisledger.Options{Prefix: rc.prefix(), Location: loc})
		return l, func() { client.Close() }, nil
	}
	db, err := openStoreForReport(filepath.Join(dir, "stint.db"))
	if err != nil {
		return nil, nil, err
	}
	l, err := boltledger.New(db, boltledger.Options{Location: loc})
	if err != nil {
		db.Close()
		return nil, nil, err
	}
	return l, func() { db.Close() }, nil
}

func openStoreForReport(path string) (*bbolt.DB, error) {
	if _, err := os.Stat(path); err != nil {
		return nil, fmt.Errorf("no store at %s (give --data DIR, or --config with its data directory): %w", path, err)
	}
	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: storeLockTimeout})
	if errors.Is(err, bberrors.ErrTimeout) {
		return nil, fmt.Errorf("the store %s is locked by another process, most likely a running stint serve: stop it to read the statement from the file, or leave out --data and --config to ask the running proxy", path)
	}
	if err != nil {
		return nil, fmt.Errorf("open store %s: %w", path, err)
	}
	return db, nil
}

// runStatementRemote asks a running proxy for the statement.
func runStatementRemote(ctx context.Context, out io.Writer, f statementFlags) error {
	c, err := f.remote.client()
	if err != nil {
		return err
	}
	q := url.Values{"since": {f.since}, "by": {f.by}}
	if f.team != "" {
		q.Set("team", f.team)
	}
	var rep statement
	if err := c.json(ctx, http.MethodGet, proxy.AdminPrefix+"statement", q, nil, &rep); err != nil {
		var pe *proxyError
		if errors.As(err, &pe) && pe.Code == "invalid_value" {
			// The proxy's message names its query parameters (since=, by=);
			// these are the flags of the same names.
			return fmt.Errorf("--since or --by: %s", pe.Message)
		}
		return err
	}
	return writeStatement(out, rep, f.json)
}

func writeStatement(out io.Writer, rep statement, asJSON bool) error {
	if asJSON {
		return printJSON(out, rep)
	}
	return printStatement(out, rep)
}
