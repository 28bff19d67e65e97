package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/jobs"
	"github.com/stintlab/stint/searcher/jobs/redisjobs"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
)

// searchFlags are the settings of `stint search run`.
type searchFlags struct {
	remote proxyFlags
	out    string
	model  string
	run    string
	replay bool
	// price overrides the task's prices for the forecast (USD per million
	// tokens); overCap starts a search whose forecast is over the task's
	// spend cap, or that has a cap and no price.
	price   search.PriceOverride
	overCap bool
	// checkpointEvery, stopAfter and resume control checkpoints in
	// OUT/checkpoint.json.
	checkpointEvery int
	stopAfter       int
	resume          bool
	// seed and steps, when set, replace the task file's.
	seed  *int64
	steps int
	// json prints results.json instead of the results table; trusted
	// skips the check that --proxy reaches a proxy (the demo's own).
	json    bool
	trusted bool
	// resumeCommand is the command line that resumes this search, said
	// when it stops part way; "" says to add --resume.
	resumeCommand string
	// totals, when set, receives the search's call totals.
	totals *scorer.Totals
}

func newSearchCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "search",
		Short: "Search for a classification prompt with RL, through the proxy",
		Long: `Search for a classification prompt: an RL search (soft Q-learning over
prompt tokens, on the local model as its frozen backbone) whose every
scoring call goes through the proxy, so repeats are cached, spend is
budgeted and the whole search is recorded for replay. "search run" runs one
in the foreground, "search serve" is the sidecar that runs submitted ones,
"search headroom" surveys a task first and "search compare" runs the search
against its baselines over tasks and seeds.

Every one takes --proxy (the proxy's base URL, with or without /v1;
http://127.0.0.1:8787 unless given) and --key (else $STINT_KEY; a proxy run
without a config needs none).`,
		Example: `  stint search example > task.yaml
  stint search run task.yaml --out ./task-out
  stint search compare --local`,
	}
	var f searchFlags
	run := &cobra.Command{
		Use:   "run TASK",
		Short: "Run a prompt search in the foreground",
		Long: `Run the prompt search a task file describes (see "stint search example").
The policy is a small network on the local model (--model or STINT_MODEL) as
its frozen backbone; every prompt it proposes is scored through the proxy,
so repeats are cached, spend is budgeted and the whole run is recorded under
--run. Baselines (no prompt, the task's manual prompts, random search at the
same number of scorings) run in the same search.

With --replay the run is answered from the proxy's journal only: it makes no
upstream call and writes the same results.json.

Outputs in --out: results.json, history.csv, report.md and the learning
curve as learning-curve.png and .svg.

A search that stops part way (a 402 when the team's budget runs out, the
task's spend cap) keeps results.json with the contenders found so far and a
checkpoint, and prints the command that goes on: the same one with
--resume, which takes the answers it already had instead of buying them
again. Progress goes to stderr, one line per phase with the time left.`,
		Example: `  stint search run orchard.yaml --out ./orchard-out
  STINT_KEY=... stint search run task.yaml --proxy http://10.0.0.5:8787 --run orchard-7 --replay
  stint search run task.yaml --seed 3 --steps 60 --json > results.json`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			f.resumeCommand = resumeCommand(cmd, args)
			return runSearch(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), args[0], f)
		},
	}
	fl := run.Flags()
	f.remote.register(fl)
	fl.StringVar(&f.out, "out", "./search-out", "directory for results.json, history.csv and report.md")
	fl.StringVar(&f.model, "model", "", "GGUF model for the policy's backbone")
	fl.StringVar(&f.run, "run", "", "run id the calls are recorded under")
	fl.BoolVar(&f.replay, "replay", false, "answer every call from the run's journal; no upstream calls")
	priceFlags(fl, &f.price)
	fl.BoolVar(&f.overCap, "over-cap", false, "start even when the forecast is over the task's spend_cap_usd, or the task has a cap and no price")
	fl.IntVar(&f.checkpointEvery, "checkpoint-every", 0, "write OUT/checkpoint.json every N steps")
	fl.IntVar(&f.stopAfter, "stop-after", 0, "stop after step N with a checkpoint (resume later with --resume)")
	fl.BoolVar(&f.resume, "resume", false, "continue from OUT/checkpoint.json exactly where it stopped")
	var seed int64
	fl.Int64Var(&seed, "seed", 0, "the search's seed")
	fl.IntVar(&f.steps, "steps", 0, "search steps")
	fl.BoolVar(&f.json, "json", false, "print results.json instead of the results table (the rest goes to stderr)")
	describeFlag(fl, "out", "DIR", "")
	describeFlag(fl, "model", "FILE", "$STINT_MODEL, else the downloaded copy")
	describeFlag(fl, "run", "ID", "TASKNAME-sSEED")
	describeFlag(fl, "checkpoint-every", "N", "every tenth of the steps")
	describeFlag(fl, "stop-after", "STEP", "")
	describeFlag(fl, "seed", "N", "the task's seed")
	describeFlag(fl, "steps", "N", "the task's steps")
	run.PreRun = func(cmd *cobra.Command, _ []string) {
		if cmd.Flags().Changed("seed") {
			f.seed = &seed
		}
	}
	example := &cobra.Command{
		Use:   "example",
		Short: "Print a complete, commented task file",
		Long: `Print a complete task file with every setting commented: the model and
endpoint, the template and labels, the data files, the prompt's length and
allowed tokens, the learner, the reward, the choice, the baselines, prices
and the spend cap. It is the demo's task, with its data files named from the
repository root (testdata/search/...): saved there as below, it runs as is.`,
		Example: `  stint search example > task.yaml
  stint search run task.yaml --out ./task-out`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			_, err := io.WriteString(cmd.OutOrStdout(), task.ExampleAt(task.ExampleDataDir))
			if _, serr := os.Stat(filepath.Join(filepath.FromSlash(task.ExampleDataDir), "reading-corner-train.jsonl")); serr != nil {
				fmt.Fprintf(cmd.ErrOrStderr(), "note: its data files are in %s of the repository; save the task file in the repository root, or change its data paths\n", task.ExampleDataDir)
			}
			return err
		},
	}
	cmd.AddCommand(run, example, newSearchServeCmd(), newHeadroomCmd(), newCompareCmd())
	return cmd
}

// priceFlags adds --input-price and --output-price, which override the
// task's prices section; a flag not given keeps the task's price.
func priceFlags(fl *pflag.FlagSet, o *search.PriceOverride) {
	fl.Var(optionalFloat{&o.InputPerMillion}, "input-price", "USD per million input tokens, for the cost forecast")
	fl.Var(optionalFloat{&o.OutputPerMillion}, "output-price", "USD per million output tokens, for the cost forecast")
	describeFlag(fl, "input-price", "USD", "the task's prices.input_per_million")
	describeFlag(fl, "output-price", "USD", "the task's prices.output_per_million")
}

// optionalFloat is a float flag that stays nil until it is given.
type optionalFloat struct{ v **float64 }

func (o optionalFloat) String() string {
	if o.v == nil || *o.v == nil {
		return ""
	}
	return strconv.FormatFloat(**o.v, 'g', -1, 64)
}

func (o optionalFloat) Set(s string) error {
	x, err := strconv.ParseFloat(s, 64)
	if err != nil {
		return err
	}
	if !(x >= 0) || math.IsInf(x, 1) {
		return fmt.Errorf("want a finite USD amount >= 0, got %s", s)
	}
	*o.v = &x
	return nil
}

func (optionalFloat) Type() string { return "usd" }

// defaultSearchListen is the sidecar's default address: its own port, next
// to the proxy's 8787 and stint local's 8788, and the one the deployment
// files give it (deploy/compose.yaml, deploy/k8s/search.yaml).
const defaultSearchListen = "127.0.0.1:8789"

// serveSearchFlags are the settings of `stint search serve`.
type serveSearchFlags struct {
	listen, data, model string
	remote              proxyFlags
	every               int
	price               search.PriceOverride
	// config, when its store.redis is set, puts the jobs on Redis, shared
	// by every sidecar given the same; jobs, lease, poll and name are
	// this sidecar's part in that queue.
	config string
	jobs   int
	lease  time.Duration
	poll   time.Duration
	name   string
	// queueFlags are those of jobs, lease, poll and name given on the
	// command line, which need a shared queue.
	queueFlags []string
}

func newSearchServeCmd() *cobra.Command {
	var f serveSearchFlags
	cmd := &cobra.Command{
		Use:   "serve",
		Short: "Run the search sidecar: an HTTP API to submit, watch and cancel searches",
		Long: `Run searches submitted over HTTP through the proxy:

  POST /jobs              {"task": "/path/task.yaml", "run": "ID", "over_cap": false}
  GET  /jobs              every job, newest first
  GET  /jobs/{id}         state, step, best prompt so far (by dev accuracy), accuracies, calls, cache share, spend, sidecar
  GET  /jobs/{id}/history the learning curve so far
  GET  /jobs/{id}/out/results.json   (also history.csv, report.md) once it is done
  POST /jobs/{id}/cancel

Without --config (or with a config that has no store.redis), jobs and their
outputs are kept under --data, run one at a time, and a job that was
running when the sidecar stopped resumes from its last checkpoint when it
starts again.

With --config FILE whose store.redis names a Redis or Redis Cluster (the
proxy's section, same shape), every sidecar given it shares one job queue:
each runs up to --jobs searches at once, every one answers the API for
every job, and a sidecar that dies loses its jobs' claims after --lease;
another sidecar resumes them from their last checkpoint (kept in Redis,
compressed) and their results are those of an uninterrupted run. Task
paths must be readable at the same path on every sidecar.

The team key is --key or $STINT_KEY. --input-price and --output-price
override every task's prices for its forecast, as for "stint search run"; a
job whose task has a spend cap and no price is refused unless over_cap.
Errors have the proxy's body, {"error":{"message","type","param","code"}}.`,
		Example: `  stint search serve
  STINT_KEY=... stint search serve --listen 0.0.0.0:8789 --proxy http://stint:8787 --data /var/lib/stint-search
  STINT_KEY=... stint search serve --config /etc/stint/stint.yaml --jobs 2 --listen 0.0.0.0:8789 --proxy http://stint:8787
  curl -s localhost:8789/jobs -d '{"task": "/srv/tasks/feelings.yaml"}'`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			for _, name := range []string{"jobs", "lease", "poll", "name"} {
				if cmd.Flags().Changed(name) {
					f.queueFlags = append(f.queueFlags, "--"+name)
				}
			}
			return runSearchServe(cmd.Context(), cmd.ErrOrStderr(), f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.listen, "listen", defaultSearchListen, "address of the job API")
	f.remote.register(fl)
	fl.StringVar(&f.data, "data", "./stint-search-data", "directory for jobs, checkpoints and outputs")
	fl.StringVar(&f.model, "model", "", "GGUF model for the policy's backbone")
	fl.IntVar(&f.every, "checkpoint-every", 0, "checkpoint every N steps")
	priceFlags(fl, &f.price)
	fl.StringVar(&f.config, "config", "", "config file whose store.redis holds a job queue shared by several sidecars")
	fl.IntVar(&f.jobs, "jobs", 1, "searches this sidecar runs at once from the shared queue")
	fl.DurationVar(&f.lease, "lease", redisjobs.DefaultLease, "how long a job's claim holds without a heartbeat before another sidecar takes it")
	fl.DurationVar(&f.poll, "poll", redisjobs.DefaultPoll, "how often an idle sidecar asks the shared queue for a job")
	fl.StringVar(&f.name, "name", "", "this sidecar's name in the shared queue and on the operator page")
	describeFlag(fl, "listen", "ADDR", "")
	describeFlag(fl, "data", "DIR", "")
	describeFlag(fl, "model", "FILE", "$STINT_MODEL, else the downloaded copy")
	describeFlag(fl, "checkpoint-every", "N", "every tenth of the steps")
	describeFlag(fl, "config", "FILE", "none: jobs kept under --data")
	describeFlag(fl, "jobs", "N", "")
	describeFlag(fl, "lease", "DURATION", "")
	describeFlag(fl, "poll", "DURATION", "")
	describeFlag(fl, "name", "NAME", "HOST-PID-RANDOM")
	return cmd
}

func runSearchServe(ctx context.Context, log io.Writer, f serveSearchFlags) error {
	proxyURL, err := f.remote.apiBase()
	if err != nil {
		return err
	}
	key := f.remote.keyOf(os.Getenv)
	var shared *RedisConfig
	if f.config != "" {
		cfg, err := LoadConfig(f.config)
		if err != nil {
			return err
		}
		shared = cfg.Store.Redis
	}
	if shared == nil && len(f.queueFlags) > 0 {
		return fmt.Errorf("%s: only for sidecars sharing a queue; give --config FILE with a store.redis section", strings.Join(f.queueFlags, ", "))
	}
	if shared != nil && (f.jobs < 1 || f.lease < 300*time.Millisecond || f.poll <= 0) {
		return fmt.Errorf("--jobs must be at least 1, --lease at least 300ms and --poll positive; got %d, %s, %s", f.jobs, f.lease, f.poll)
	}
	modelPath, err := localmodel.Locate(f.model, os.Getenv)
	if err != nil {
		return fmt.Errorf("the policy needs the local model as its backbone: %w", err)
	}
	m, backbone, err := loadBackbone(modelPath)
	if err != nil {
		return err
	}
	var svc jobs.Service
	where := "data=" + f.data
	if shared == nil {
		mgr, err := jobs.Open(f.data, m, jobs.Options{Proxy: proxyURL, Key: key, CheckpointEvery: f.every, Price: f.price, Backbone: backbone})
		if err != nil {
			return err
		}
		defer mgr.Close()
		svc = jobs.ManagerService(mgr)
	} else {
		rdb, err := shared.client(ctx)
		if err != nil {
			return err
		}
		defer rdb.Close()
		q, err := redisjobs.Open(ctx, rdb, m, redisjobs.Options{Prefix: shared.prefix(), Name: f.name, Jobs: f.jobs, Lease: f.lease, Poll: f.poll,
			Dir: f.data, Proxy: proxyURL, Key: key, CheckpointEvery: f.every, Price: f.price, Backbone: backbone, Log: log})
		if err != nil {
			return err
		}
		defer q.Close()
		svc = q
		where = fmt.Sprintf("queue=redis:%s name=%s jobs=%d", strings.Join(shared.Addrs, ","), q.Name(), f.jobs)
	}
	ln, err := net.Listen("tcp", f.listen)
	if err != nil {
		return err
	}
	hs := &http.Server{Handler: jobs.NewHandler(svc), ReadHeaderTimeout: 30 * time.Second}
	errc := make(chan error, 1)
	go func() { errc <- hs.Serve(ln) }()
	fmt.Fprintf(log, "stint search serve listening addr=%s %s proxy=%s\n", ln.Addr(), where, proxyURL)
	select {
	case err := <-errc:
		return err
	case <-ctx.Done():
		sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 10*time.Second)
		defer cancel()
		return hs.Shutdown(sctx)
	}
}

// loadBackbone loads the policy's backbone model and names its file once
// for results.json.
func loadBackbone(path string) (*localmodel.Model, search.Backbone, error) {
	m, err := localmodel.Load(path)
	if err != nil {
		return nil, search.Backbone{}, err
	}
	b, err := search.IdentifyBackbone(path)
	return m, b, err
}

func runSearch(ctx context.Context, out, progress io.Writer, taskPath string, f searchFlags) error {
	api, err := f.remote.apiBase()
	if err != nil {
		return err
	}
	if !f.trusted {
		c, err := f.remote.client()
		if err != nil {
			return err
		}
		if err := c.check(ctx); err != nil {
			return err
		}
	}
	modelPath, err := localmodel.Locate(f.model, os.Getenv)
	if err != nil {
		return fmt.Errorf("the policy needs the local model as its backbone: %w", err)
	}
	m, backbone, err := loadBackbone(modelPath)
	if err != nil {
		return err
	}
	results := out
	if f.json {
		out = progress // the JSON alone goes to stdout
	}
	sp := newSearchProgress(progress)
	oc, err := search.RunJob(ctx, m, search.Job{
		TaskPath: taskPath, Proxy: api, Key: f.remote.keyOf(os.Getenv), Run: f.run, Out: f.out, Replay: f.replay, Resume: f.resume,
		Price: f.price, OverCap: f.overCap, CheckpointEvery: f.checkpointEvery, StopAfter: f.stopAfter, Backbone: backbone,
		Seed: f.seed, Steps: f.steps,
	}, out, sp.show)
	sp.pl.end()
	if err != nil {
		if oc.Partial {
			fmt.Fprint(out, howToGoOn(oc, err, f))
		}
		return err
	}
	if oc.Stopped {
		fmt.Fprintf(out, "stopped early after step %d; resume with --resume from %s\n", len(oc.Results.History), filepath.Join(f.out, search.CheckpointFile))
		return nil
	}
	if f.totals != nil {
		*f.totals = oc.Results.Spending
	}
	if f.json {
		return search.WriteResults(results, oc.Results)
	}
	fmt.Fprint(out, search.Table(oc.Results))
	fmt.Fprintf(out, "\nrun %s: %s, %s\nwrote %s\n", oc.Run, search.SpendLine(oc.Results.Spending, f.replay), oc.Wall.Round(time.Second), f.out)
	return nil
}

// howToGoOn says what a search that failed part way kept and the command
// line that goes on from it.
func howToGoOn(oc search.Outcome, err error, f searchFlags) string {
	var b strings.Builder
	var found []string
	for _, c := range oc.Results.Ranking {
		found = append(found, c.Method)
	}
	kept := filepath.Join(f.out, "results.json")
	if len(found) > 0 {
		kept += " (the contenders found so far: " + strings.Join(found, ", ") + ")"
	} else {
		kept += " (no contender finished yet)"
	}
	if oc.Results.Resumable {
		kept += " and " + filepath.Join(f.out, search.CheckpointFile)
	}
	fmt.Fprintf(&b, "\nthe search stopped part way; kept %s\n", kept)
	if !oc.Results.Resumable {
		return b.String()
	}
	switch {
	case errors.Is(err, scorer.ErrBudget):
		b.WriteString("the proxy refused a call for the team's budget (402): raise it (stint budget set --team NAME --usd USD, as the proxy's admin) or wait for its next period, then go on with:\n")
	case errors.Is(err, search.ErrSpendCap):
		b.WriteString("the task's spend_cap_usd is reached: raise it in the task file, then go on with:\n")
	default:
		b.WriteString("go on with:\n")
	}
	if f.resumeCommand != "" {
		fmt.Fprintf(&b, "  %s\n", f.resumeCommand)
	} else {
		b.WriteString("  the same stint search run command with --resume\n")
	}
	b.WriteString("(it goes on from the checkpoint; the answers had since are taken again, not bought again)\n")
	return b.String()
}

// resumeCommand is the command line that resumes the search cmd runs: its
// arguments and the flags given, without --stop-after, with --resume.
func resumeCommand(cmd *cobra.Command, args []string) string {
	parts := []string{cmd.CommandPath()}
	for _, a := range args {
		parts = append(parts, shellQuote(a))
	}
	cmd.Flags().Visit(func(fl *pflag.Flag) {
		switch fl.Name {
		case "resume", "stop-after":
			return
		}
		if fl.Value.Type() == "bool" {
			if fl.Value.String() == "true" {
				parts = append(parts, "--"+fl.Name)
			}
			return
		}
		parts = append(parts, "--"+fl.Name, shellQuote(fl.Value.String()))
	})
	return strings.Join(append(parts, "--resume"), " ")
}

// searchProgress shows a search's progress on one status line (see
// progressLine), with the time left in each phase at its pace so far.
type searchProgress struct {
	pl         *progressLine
	start      time.Time // of the search phase
	phase      string
	phaseStart time.Time
}

func newSearchProgress(w io.Writer) *searchProgress {
	now := time.Now()
	return &searchProgress{pl: newProgressLine(w), start: now, phase: search.PhaseSearch, phaseStart: now}
}

func (sp *searchProgress) show(p search.Progress) {
	if p.Phase != sp.phase {
		sp.pl.next() // each phase on a line of its own, its first shown at once
		sp.phase, sp.phaseStart = p.Phase, time.Now()
	}
	sp.pl.show(progressText(p, sp.start, sp.phaseStart))
}

// progressText is one status line: in the search, step, reward,
// accuracies, calls, cache share, spend, the share of verbalizers floored
// and the time left at this pace; in a later phase how far it is, the
// calls so far and its time left.
func progressText(p search.Progress, start, phaseStart time.Time) string {
	texts := fmt.Sprintf("calls %d texts from the cache %4.1f%% spent %.4f USD floored %4.1f%%",
		p.Calls.Calls, 100*p.Calls.CacheShare(), p.Calls.RunCostUSD, 100*p.FlooredShare)
	if p.Phase != search.PhaseSearch {
		unit := "judgements"
		if p.Phase == search.PhaseEvaluate {
			unit = "contenders"
		}
		return fmt.Sprintf("%s %-10s %d/%d %s %s eta %s",
			progressBar(p.Done, p.Total, 20), p.Phase, p.Done, p.Total, unit, texts, paceETA(time.Since(phaseStart), p.Done, p.Total))
	}
	dev := "  -  "
	if p.DevAcc >= 0 {
		dev = fmt.Sprintf("%4.1f%%", 100*p.DevAcc)
	}
	return fmt.Sprintf("%s step %d/%d reward %+.2f train %4.1f%% dev %s %s eta %s",
		progressBar(p.Step, p.Steps, 20), p.Step, p.Steps, p.MeanReward, 100*p.TrainAcc, dev, texts, eta(time.Since(start), p))
}

// eta is the time the steps left take at the pace of the steps this
// process ran in elapsed (on a resumed search, those since the
// checkpoint, not all steps so far).
func eta(elapsed time.Duration, p search.Progress) time.Duration {
	done := p.Step - p.ResumedAfter
	if done <= 0 {
		return 0
	}
	return time.Duration(float64(elapsed) / float64(done) * float64(p.Steps-p.Step)).Round(time.Second)
}

func progressBar(done, total, width int) string {
	n := 0
	if total > 0 {
		n = done * width / total
	}
	b := make([]byte, width+2)
	b[0], b[width+1] = '[', ']'
	for i := range width {
		b[i+1] = '.'
		if i < n {
			b[i+1] = '#'
		}
	}
	return string(b)
}
