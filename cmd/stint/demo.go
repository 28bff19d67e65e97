package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
)

// demoFlags are the settings of `stint demo`.
type demoFlags struct {
	model   string
	data    string
	out     string
	dataset string
	steps   int
	seed    int64
	// keepData reuses the cache an earlier demo left in data instead of
	// starting afresh.
	keepData bool
}

func newDemoCmd() *cobra.Command {
	var f demoFlags
	cmd := &cobra.Command{
		Use:   "demo",
		Short: "Run the local model, the proxy and a short prompt search, all offline",
		Long: `Start the local model, the caching proxy on the embedded store and a prompt
search on the demo task (short sentences from an invented co-op's reading
corner, to be named after the girl or the boy of its picture books, " Lily"
or " Tim"), then run the same search again to show the cache at work.
Prints the results table and what the proxy saved, at invented demo
prices; writes the report, history and learning curve to --out.

Each demo starts on a fresh cache: a stint.db an earlier demo left in --data
is removed first (so the first search's figures are its own), unless
--keep-data reuses it, which the demo then says. A --data holding a store
that is not a demo's is refused rather than removed.

Run it from the repository root (the demo data is in testdata/search).`,
		Example: `  go run ./cmd/stint demo
  stint demo --model ../shared/models/stories260K.gguf --steps 60 --seed 3
  stint demo --keep-data`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runDemo(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.model, "model", "", "GGUF model file")
	fl.StringVar(&f.data, "data", "./stint-demo-data", "data directory of the demo's proxy")
	fl.BoolVar(&f.keepData, "keep-data", false, "reuse the cache an earlier demo left in --data instead of starting afresh")
	fl.StringVar(&f.out, "out", "./stint-demo-out", "where the search writes its results")
	fl.StringVar(&f.dataset, "dataset", filepath.Join("testdata", "search"), "folder with the demo task's data")
	fl.IntVar(&f.steps, "steps", 90, "search steps")
	fl.Int64Var(&f.seed, "seed", 7, "the search's seed")
	describeFlag(fl, "model", "FILE", "$STINT_MODEL, else the downloaded copy")
	describeFlag(fl, "data", "DIR", "")
	describeFlag(fl, "out", "DIR", "")
	describeFlag(fl, "dataset", "DIR", "")
	describeFlag(fl, "steps", "N", "")
	describeFlag(fl, "seed", "N", "")
	return cmd
}

func runDemo(ctx context.Context, out, progress io.Writer, f demoFlags) error {
	modelPath, err := localmodel.Locate(f.model, os.Getenv)
	if errors.Is(err, localmodel.ErrModelNotFound) {
		return fmt.Errorf("the demo needs the model file %s (%w).\n%s", localmodel.ModelFileName, err, howToGetTheModel(f.model, os.Getenv))
	}
	if err != nil {
		return err
	}
	reused, err := prepareDemoData(f.data, f.keepData)
	if err != nil {
		return err
	}
	taskPath, err := writeDemoTask(f)
	if err != nil {
		return err
	}
	lp, err := startLocalProxy(ctx, modelPath, f.data)
	if err != nil {
		return err
	}
	defer lp.Close()
	srv, proxyURL := lp.srv, lp.url
	fmt.Fprintf(out, "stint demo: proxy on %s, local model %s in-process as its upstream\n", proxyURL, filepath.Base(modelPath))
	if reused {
		fmt.Fprintf(out, "stint demo: reusing the cache an earlier demo left in %s (--keep-data): the first search is answered from it, so its figures are not what a first search costs\n\n", f.data)
	} else {
		fmt.Fprintf(out, "stint demo: a fresh cache in %s\n\n", f.data)
	}

	start := time.Now()
	fmt.Fprintln(out, "== search (every prompt scored through the proxy)")
	// The search forecasts at the prices the demo's proxy charges.
	sf := searchFlags{remote: proxyFlags{proxy: proxyURL}, trusted: true, out: f.out, model: modelPath, run: fmt.Sprintf("reading-corner-demo-%d", start.Unix()),
		price: demoPriceOverride()}
	var first, again scorer.Totals
	sf.totals = &first
	if err := runSearch(ctx, out, progress, taskPath, sf); err != nil {
		return err
	}
	fmt.Fprintln(out, "\n== the same search again: same seed, same prompts, answered from the cache")
	sf.run += "-again"
	sf.out = filepath.Join(f.out, "again")
	sf.totals = &again
	if err := runSearch(ctx, out, progress, taskPath, sf); err != nil {
		return err
	}
	return printDemoSavings(ctx, out, srv, start, []scorer.Totals{first, again})
}

// demoTaskFile is the task the demo writes into its data directory; its
// presence marks the directory as a demo's.
const demoTaskFile = "demo-task.yaml"

// prepareDemoData readies the demo's data directory: a store an earlier
// demo left there is removed (the demo starts on a fresh cache), or kept
// with keep, when reused reports it. A store in a directory the demo did
// not make is refused, never removed.
func prepareDemoData(dir string, keep bool) (reused bool, err error) {
	db := filepath.Join(dir, "stint.db")
	if _, err := os.Stat(db); errors.Is(err, os.ErrNotExist) {
		return false, nil
	} else if err != nil {
		return false, err
	}
	if keep {
		return true, nil
	}
	if _, err := os.Stat(filepath.Join(dir, demoTaskFile)); err != nil {
		return false, fmt.Errorf("%s holds a store an earlier demo did not leave (no %s beside it): give another --data, or --keep-data to run the demo on it as it is", dir, demoTaskFile)
	}
	if err := os.Remove(db); err != nil {
		return false, fmt.Errorf("start the demo on a fresh cache: %w", err)
	}
	return false, nil
}

// writeDemoTask writes the example task with the demo's step count and
// absolute dataset paths into the data dir.
func writeDemoTask(f demoFlags) (string, error) {
	dir, err := filepath.Abs(f.dataset)
	if err != nil {
		return "", err
	}
	if _, err := os.Stat(filepath.Join(dir, "reading-corner-train.jsonl")); err != nil {
		return "", fmt.Errorf("the demo data is not at %s (run stint demo from the repository root, or give --dataset): %w", dir, err)
	}
	if f.steps <= 0 {
		return "", errors.New("--steps must be positive")
	}
	text := strings.NewReplacer(
		"steps: 90", fmt.Sprintf("steps: %d", f.steps),
		"seed: 7", fmt.Sprintf("seed: %d", f.seed),
	).Replace(task.ExampleAt(dir))
	if err := os.MkdirAll(f.data, 0o700); err != nil {
		return "", err
	}
	path := filepath.Join(f.data, demoTaskFile)
	return path, os.WriteFile(path, []byte(text), 0o600)
}

// printDemoSavings reports what the two searches' calls did (calls and
// texts from the cache, each share named for what it counts) and, from the
// proxy's spend journal, what they cost and what the cache saved, at the
// demo prices.
func printDemoSavings(ctx context.Context, out io.Writer, srv *server, since time.Time, searches []scorer.Totals) error {
	g, ok := srv.spend.(*guard.Guard)
	if !ok {
		return errors.New("demo: spend control is off")
	}
	// Savings of hits are journaled just behind their answers.
	if err := srv.proxy.Flush(ctx); err != nil {
		return err
	}
	st, err := g.Statement(ctx, budget.Query{Since: since.Add(-time.Second), By: budget.ByTeam})
	if err != nil {
		return err
	}
	t := st.Total
	fmt.Fprintf(out, "\n== what the proxy did (demo prices: %.2f / %.2f USD per million input / output tokens, invented)\n", demoInputPrice, demoOutputPrice)
	var all scorer.Totals
	for i, s := range searches {
		fmt.Fprintf(out, "search %d: %s\n", i+1, search.SpendLine(s, false))
		all.Calls, all.Upstream, all.Prompts, all.CachedPrompts = all.Calls+s.Calls, all.Upstream+s.Upstream, all.Prompts+s.Prompts, all.CachedPrompts+s.CachedPrompts
	}
	fmt.Fprintf(out, "both: scoring calls %d, upstream calls %d, %.1f%% of calls from the cache, calls saved %d; %.1f%% of texts from the cache\n",
		all.Calls, all.Upstream, 100*all.CallShare(), all.Calls-all.Upstream, 100*all.CacheShare())
	fmt.Fprintf(out, "spend journal: %d entries (a call answered partly from the cache is two: its charge and its saving), %.1f%% of entries from the cache (stint statement's ENTRIES FROM CACHE)\n",
		t.Requests, 100*t.CacheShare)
	fmt.Fprintf(out, "spent %s USD, saved %s USD (estimates from the demo prices)\n", t.SpentUSD, t.SavedUSD)
	return nil
}

// howToGetTheModel says how to get the model file the demo did not find,
// for the way the demo was run: with --model, with
// $STINT_MODEL, or with neither (the cached download).
func howToGetTheModel(flagPath string, getenv func(string) string) string {
	var b strings.Builder
	b.WriteString("Get it one of these ways:\n")
	target, from, err := modelTarget(flagPath, getenv)
	if err != nil {
		fmt.Fprintf(&b, "  - there is nowhere to download it to (%v): pass --model PATH\n", err)
	} else {
		cmd, again := "stint local --download-only", "then run the demo again: it finds the file there"
		switch from {
		case "--model":
			cmd += " --model " + shellQuote(target)
			again = "then run the demo again with --model " + shellQuote(target)
		case localmodel.ModelEnv:
			again = fmt.Sprintf("then run the demo again with %s=%s still set", localmodel.ModelEnv, shellQuote(target))
		}
		fmt.Fprintf(&b, "  - download it once (about 1.2 MB, checked against its SHA-256), from the same shell:\n      %s\n"+
			"    (\"go run ./cmd/stint local ...\" from the repository root works the same way)\n"+
			"    it writes %s (the path from %s) and exits; %s;\n", cmd, target, from, again)
	}
	fmt.Fprintf(&b, "  - or pass --model PATH, or set %s=PATH, to a copy of %s you already have.", localmodel.ModelEnv, localmodel.ModelFileName)
	return b.String()
}

// shellQuote quotes s for a POSIX shell when it holds more than plain path
// characters.
func shellQuote(s string) string {
	plain := s != ""
	for _, r := range s {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || strings.ContainsRune("_./-+:=@%", r)) {
			plain = false
			break
		}
	}
	if plain {
		return s
	}
	return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'"
}
