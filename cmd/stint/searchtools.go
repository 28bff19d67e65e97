package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/compare"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/survey"
)

// suiteGlob finds the task suite from the repository root.
var suiteGlob = filepath.Join("testdata", "search", "*.yaml")

// toolFlags are what the headroom and compare commands share.
type toolFlags struct {
	remote                 proxyFlags
	model, out, data       string
	local, overCap, asJSON bool
	price                  search.PriceOverride
	api, key               string // the proxy's /v1 base URL and the key to send, set by setup
}

func (f *toolFlags) register(cmd *cobra.Command, out string) {
	fl := cmd.Flags()
	f.remote.register(fl)
	fl.StringVar(&f.model, "model", "", "GGUF model of the local backbone")
	fl.StringVar(&f.out, "out", out, "output directory")
	fl.BoolVar(&f.local, "local", false, "start the local model and a proxy on the embedded store in-process (at the demo's invented prices) instead of using --proxy")
	fl.StringVar(&f.data, "data", "", "the --local proxy's data directory")
	fl.BoolVar(&f.overCap, "over-cap", false, "start even when the forecast is over a task's spend_cap_usd, or a task has a cap and no price")
	fl.BoolVar(&f.asJSON, "json", false, "print the JSON the command writes to OUT instead of its tables (the rest goes to stderr)")
	priceFlags(fl, &f.price)
	describeFlag(fl, "model", "FILE", "$STINT_MODEL, else the downloaded copy")
	describeFlag(fl, "out", "DIR", "")
	describeFlag(fl, "data", "DIR", "OUT/proxy")
}

// setup loads the model and, with --local, starts the local proxy; stop
// ends it.
func (f *toolFlags) setup(ctx context.Context) (m *localmodel.Model, backbone search.Backbone, stop func(), err error) {
	modelPath, err := localmodel.Locate(f.model, os.Getenv)
	if err != nil {
		return nil, backbone, nil, fmt.Errorf("the local model is needed (the policy's backbone, the tokenizer): %w", err)
	}
	if m, backbone, err = loadBackbone(modelPath); err != nil {
		return nil, backbone, nil, err
	}
	f.key = f.remote.keyOf(os.Getenv)
	stop = func() {}
	if f.local {
		data := f.data
		if data == "" {
			data = filepath.Join(f.out, "proxy")
		}
		lp, err := startLocalProxy(ctx, modelPath, data)
		if err != nil {
			return nil, backbone, nil, err
		}
		f.api = lp.url
		if f.price == (search.PriceOverride{}) {
			f.price = demoPriceOverride()
		}
		stop = func() { _ = lp.Close() }
		return m, backbone, stop, nil
	}
	if f.api, err = f.remote.apiBase(); err != nil {
		return nil, backbone, nil, err
	}
	c, err := f.remote.client()
	if err != nil {
		return nil, backbone, nil, err
	}
	if err := c.check(ctx); err != nil {
		return nil, backbone, nil, err
	}
	return m, backbone, stop, nil
}

func newHeadroomCmd() *cobra.Command {
	var f toolFlags
	var prompts int
	var seed int64
	cmd := &cobra.Command{
		Use:   "headroom TASK",
		Short: "Survey how much a prompt can help on a task, before paying for a search",
		Long: `Draw --prompts uniformly random prompts of the task's length from its
allowed tokens, judge each on every train and dev line through the proxy,
and report the spread of their accuracies, the empty prompt's, and the test
accuracy of the best of them: the headroom a prompt of this length has on
this task with this model. The prompts are the ones best-of-N draws first
with the same seed, so a later search of the task finds them in the cache.
The task's spend cap applies to the survey's forecast. Writes
OUT/headroom.json.`,
		Example: `  stint search headroom testdata/search/feelings.yaml --local
  stint search headroom task.yaml --proxy http://10.0.0.5:8787 --prompts 500 --json`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runHeadroom(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), args[0], prompts, seed, cmd.Flags().Changed("seed"), f)
		},
	}
	f.register(cmd, "./stint-headroom")
	cmd.Flags().IntVar(&prompts, "prompts", 256, "random prompts to judge")
	cmd.Flags().Int64Var(&seed, "seed", 0, "seed of the draws")
	describeFlag(cmd.Flags(), "prompts", "N", "")
	describeFlag(cmd.Flags(), "seed", "N", "the task's seed")
	return cmd
}

func runHeadroom(ctx context.Context, out, progress io.Writer, path string, prompts int, seed int64, seedSet bool, f toolFlags) error {
	if prompts < 1 {
		return fmt.Errorf("--prompts must be at least 1, got %d", prompts)
	}
	m, _, stop, err := f.setup(ctx)
	if err != nil {
		return err
	}
	defer stop()
	results := out
	if f.asJSON {
		out = progress // the JSON alone goes to stdout
	}
	t, err := search.Job{TaskPath: path}.LoadTask(m)
	if err != nil {
		return err
	}
	if !seedSet {
		seed = t.Seed
	}
	plan := search.Plan{Search: survey.Judgements(t, prompts), TokensPerJudgement: search.PlanFor(t, 0).TokensPerJudgement}
	pricing := search.PricingFor(t.Prices, f.price)
	fmt.Fprintf(out, "forecast: %d scorings", plan.Judgements())
	var forecast float64
	if pricing.Known() {
		forecast = plan.Cost(pricing.Price)
		fmt.Fprintf(out, ": at most %.4f USD before the cache (an estimate; the provider's bill is the record)", forecast)
	}
	fmt.Fprintln(out)
	note, err := search.CheckCap(t.SpendCapUSD, forecast, pricing, f.overCap)
	if err != nil {
		return err
	}
	if note != "" {
		fmt.Fprintln(out, note)
	}
	sc, err := scorer.New(scorer.Options{BaseURL: f.api, Key: f.key, Run: fmt.Sprintf("%s-headroom-s%d", t.Name, seed), Model: t.Model,
		Endpoint: scorer.Endpoint(t.Endpoint), TopLogprobs: t.TopLogprobs, Concurrency: t.Concurrency})
	if err != nil {
		return err
	}
	vocab := search.NewLocalVocab(m.Tokenizer(), t.AllowList)
	pl := newProgressLine(progress)
	start := time.Now()
	rep, err := survey.Run(ctx, t, vocab, judge.New(t, sc), survey.Options{Prompts: prompts, Seed: seed, Progress: func(done, total int) {
		pl.show(fmt.Sprintf("%s headroom %d/%d prompts eta %s", progressBar(done, total, 20), done, total, paceETA(time.Since(start), done, total)))
	}})
	pl.end()
	if err != nil {
		return err
	}
	b, err := json.MarshalIndent(rep, "", "  ")
	if err != nil {
		return err
	}
	if f.asJSON {
		if _, err := results.Write(append(b, '\n')); err != nil {
			return err
		}
	} else {
		fmt.Fprint(out, headroomTable(rep))
	}
	if err := os.MkdirAll(f.out, 0o755); err != nil {
		return err
	}
	file := filepath.Join(f.out, "headroom.json")
	if err := os.WriteFile(file, append(b, '\n'), 0o644); err != nil {
		return err
	}
	fmt.Fprintf(out, "%d scoring calls, %.6f USD reported by the proxy (an estimate); wrote %s\n", rep.Tally.Calls, rep.Tally.CostUSD, file)
	return nil
}

// headroomTable renders a survey for people.
func headroomTable(r survey.Report) string {
	var b strings.Builder
	q := r.Quantiles
	fmt.Fprintf(&b, "%s: %d random prompts (seed %d) from %d allowed tokens, each judged on %d train and dev lines\n", r.Task, len(r.Prompts), r.Seed, r.Actions, r.Lines)
	fmt.Fprintf(&b, "  accuracy on train+dev: mean %.1f%% sd %.1f | min %.1f q10 %.1f q25 %.1f median %.1f q75 %.1f q90 %.1f max %.1f\n",
		100*r.Mean, 100*r.SD, 100*q["min"], 100*q["q10"], 100*q["q25"], 100*q["median"], 100*q["q75"], 100*q["q90"], 100*q["max"])
	test := func(x float64) string {
		if x < 0 {
			return "-"
		}
		return fmt.Sprintf("%.1f%%", 100*x)
	}
	fmt.Fprintf(&b, "  empty prompt: %.1f%% train+dev, %s test\n", 100*r.Empty, test(r.EmptyTest))
	fmt.Fprintf(&b, "  best prompt %q: %.1f%% train+dev, %s test\n", r.Best.Prompt, 100*r.Best.Accuracy, test(r.BestTest))
	return b.String()
}

func newCompareCmd() *cobra.Command {
	var f toolFlags
	var seeds string
	var surveyPrompts int
	cmd := &cobra.Command{
		Use:   "compare [TASK...]",
		Short: "Compare the RL search with its baselines over tasks and seeds",
		Long: `For every task and seed, run the RL search with its baselines (best-of-N
and successive halving over random prompts, at the search's judgements), the
empty prompt and the task's manual prompts through the proxy; then give
best-of-N and halving the spend the RL search was charged on its own (cache
hits free: new texts at the price before the cache) and judge them again.
Prints one table per task (test accuracy, mean and sd over seeds) and the
suite's means and spread, with a headroom survey of each task; writes
OUT/compare.json and every search's own outputs under OUT/TASK/sSEED. An
interrupted comparison resumes: run it again with the same OUT.

Without TASK arguments it runs the task suite in testdata/search (run it
from the repository root). Spend is in USD when the proxy prices the calls,
else in texts paid for; either way an estimate: the provider's bill is the
record.`,
		Example: `  stint search compare --local
  stint search compare testdata/search/feelings.yaml --seeds 1,2,3 --proxy http://10.0.0.5:8787`,
		RunE: func(cmd *cobra.Command, args []string) error {
			return runCompare(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), args, seeds, surveyPrompts, f)
		},
	}
	f.register(cmd, "./stint-compare")
	cmd.Flags().StringVar(&seeds, "seeds", "1,2,3,4,5", "comma-separated seeds")
	cmd.Flags().IntVar(&surveyPrompts, "headroom", 256, "random prompts in each task's headroom survey (0: none)")
	describeFlag(cmd.Flags(), "seeds", "LIST", "")
	describeFlag(cmd.Flags(), "headroom", "N", "")
	return cmd
}

func runCompare(ctx context.Context, out, progress io.Writer, tasks []string, seedList string, surveyPrompts int, f toolFlags) error {
	seeds, err := parseSeeds(seedList)
	if err != nil {
		return err
	}
	if len(tasks) == 0 {
		if tasks, err = filepath.Glob(suiteGlob); err != nil || len(tasks) == 0 {
			return fmt.Errorf("no task files at %s: run from the repository root, or name the task files", suiteGlob)
		}
		sort.Strings(tasks)
	}
	m, backbone, stop, err := f.setup(ctx)
	if err != nil {
		return err
	}
	defer stop()
	results := out
	if f.asJSON {
		out = progress // the JSON alone goes to stdout
	}
	pl := newProgressLine(progress)
	res, err := compare.Run(ctx, m, compare.Options{Tasks: tasks, Seeds: seeds, Out: f.out, Proxy: f.api, Key: f.key, Price: f.price, OverCap: f.overCap,
		Survey: surveyPrompts, Backbone: backbone, Log: lineBreaker{pl, out},
		Progress: func(p compare.Progress) {
			sp := p.Search
			inner := fmt.Sprintf("%s %d/%d", sp.Phase, sp.Done, sp.Total)
			eta := "-"
			if p.ETA > 0 {
				eta = p.ETA.String()
			}
			pl.show(fmt.Sprintf("%s %d/%d %s: %s, eta %s", progressBar(p.Done, p.Total, 20), p.Done, p.Total, p.Part, inner, eta))
		}})
	pl.end()
	if err != nil {
		return fmt.Errorf("%w (run the same command again to resume)", err)
	}
	if f.asJSON {
		return printJSON(results, res)
	}
	priced := len(res.Cells) > 0 && res.Cells[0].Priced
	fmt.Fprint(out, "\n"+compare.Report(res.Summary, priced))
	fmt.Fprintf(out, "wall time %s; wrote %s\n", time.Duration(res.Wall*float64(time.Second)).Round(time.Second), filepath.Join(f.out, "compare.json"))
	return nil
}

func parseSeeds(s string) ([]int64, error) {
	var out []int64
	for _, part := range strings.Split(s, ",") {
		n, err := strconv.ParseInt(strings.TrimSpace(part), 10, 64)
		if err != nil {
			return nil, fmt.Errorf("--seeds: %q is not a whole number (want e.g. 1,2,3)", part)
		}
		out = append(out, n)
	}
	return out, nil
}

// paceETA is the time the rest of total takes at the pace of done in
// elapsed.
func paceETA(elapsed time.Duration, done, total int) time.Duration {
	if done <= 0 {
		return 0
	}
	return time.Duration(float64(elapsed) / float64(done) * float64(total-done)).Round(time.Second)
}

// progressLine shows a status line: redrawn in place on a terminal,
// otherwise printed as a plain line at most every progressEvery.
type progressLine struct {
	w        io.Writer
	terminal bool
	last     time.Time
	drawn    bool
}

const progressEvery = 10 * time.Second

func newProgressLine(w io.Writer) *progressLine {
	pl := &progressLine{w: w}
	if f, ok := w.(*os.File); ok {
		if st, err := f.Stat(); err == nil && st.Mode()&os.ModeCharDevice != 0 {
			pl.terminal = true
		}
	}
	return pl
}

func (pl *progressLine) show(s string) {
	if pl.terminal {
		fmt.Fprintf(pl.w, "\r%s   ", s)
		pl.drawn = true
		return
	}
	if now := time.Now(); now.Sub(pl.last) >= progressEvery {
		pl.last = now
		fmt.Fprintln(pl.w, s)
	}
}

// next ends the line and shows the next one at once, also when output is
// not a terminal.
func (pl *progressLine) next() {
	pl.end()
	pl.last = time.Time{}
}

// end finishes a drawn line.
func (pl *progressLine) end() {
	if pl.drawn {
		fmt.Fprintln(pl.w)
		pl.drawn = false
	}
}

// lineBreaker ends the progress line before each write to w, so log lines
// do not land in the middle of it.
type lineBreaker struct {
	pl *progressLine
	w  io.Writer
}

func (l lineBreaker) Write(p []byte) (int, error) {
	l.pl.end()
	return l.w.Write(p)
}
