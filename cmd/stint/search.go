package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
)

// searchFlags are the settings of `stint search run`.
type searchFlags struct {
	proxy  string
	key    string
	out    string
	model  string
	run    string
	replay bool
	// price prices the forecast (USD per million tokens); overCap starts
	// a search whose forecast is over the task's spend cap.
	price   scorer.Price
	overCap bool
	// checkpointEvery, stopAfter and resume control checkpoints in
	// OUT/checkpoint.json.
	checkpointEvery int
	stopAfter       int
	resume          bool
}

func newSearchCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "search",
		Short: "Search for a classification prompt with RL, through the proxy",
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
curve as learning-curve.png and .svg.`,
		Example: `  stint search run orchard.yaml --proxy http://127.0.0.1:8787/v1 --out ./orchard-out
  STINT_KEY=... stint search run task.yaml --run orchard-7 --replay`,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			return runSearch(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), args[0], f)
		},
	}
	fl := run.Flags()
	fl.StringVar(&f.proxy, "proxy", "http://127.0.0.1:8787/v1", "the proxy's base URL, version path included")
	fl.StringVar(&f.key, "key", "", "the team's client key (default: $STINT_KEY)")
	fl.StringVar(&f.out, "out", "./search-out", "directory for results.json, history.csv and report.md")
	fl.StringVar(&f.model, "model", "", "GGUF model for the policy's backbone (default: $STINT_MODEL)")
	fl.StringVar(&f.run, "run", "", "run id the calls are recorded under (default: TASKNAME-sSEED)")
	fl.BoolVar(&f.replay, "replay", false, "answer every call from the run's journal; no upstream calls")
	fl.Float64Var(&f.price.InputPerMillion, "input-price", 0, "USD per million input tokens, for the cost forecast")
	fl.Float64Var(&f.price.OutputPerMillion, "output-price", 0, "USD per million output tokens, for the cost forecast")
	fl.BoolVar(&f.overCap, "over-cap", false, "start even when the forecast is over the task's spend_cap_usd")
	fl.IntVar(&f.checkpointEvery, "checkpoint-every", 0, "write OUT/checkpoint.json every N steps (default: every tenth of the steps)")
	fl.IntVar(&f.stopAfter, "stop-after", 0, "stop after step N with a checkpoint (resume later with --resume)")
	fl.BoolVar(&f.resume, "resume", false, "continue from OUT/checkpoint.json exactly where it stopped")
	example := &cobra.Command{
		Use:   "example",
		Short: "Print a complete, commented task file",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			_, err := io.WriteString(cmd.OutOrStdout(), task.ExampleFile)
			return err
		},
	}
	cmd.AddCommand(run, example)
	return cmd
}

func runSearch(ctx context.Context, out, progress io.Writer, taskPath string, f searchFlags) error {
	modelPath, err := localmodel.Locate(f.model, os.Getenv)
	if err != nil {
		return fmt.Errorf("the policy needs the local model as its backbone: %w", err)
	}
	m, err := localmodel.Load(modelPath)
	if err != nil {
		return err
	}
	t, err := task.Load(taskPath, task.NewLocalTokenizer(m.Tokenizer()))
	if err != nil {
		return err
	}
	vocab := search.NewLocalVocab(m.Tokenizer(), t.AllowList)
	if len(vocab.Actions()) == 0 {
		return errors.New("the task's allow_list admits no token of the model")
	}
	backbone, err := policy.NewLocal(m, policy.LocalOptions{})
	if err != nil {
		return err
	}
	ckptPath := filepath.Join(f.out, "checkpoint.json")
	var resume *search.State
	var trainer *policy.Trainer
	if f.resume {
		if resume, err = readCheckpoint(ckptPath, t); err != nil {
			return err
		}
		if trainer, err = policy.Load(resume.PolicyReader(), backbone); err != nil {
			return fmt.Errorf("resume %s: %w", ckptPath, err)
		}
		fmt.Fprintf(out, "resuming after step %d from %s\n", resume.Step, ckptPath)
	} else if trainer, err = policy.NewTrainer(backbone, policy.Config{PromptLength: t.PromptLength, Seed: uint64(t.Seed), Actions: vocab.Actions()}); err != nil {
		return err
	}
	key := f.key
	if key == "" {
		key = os.Getenv(teamKeyEnv)
	}
	runID := f.run
	if runID == "" {
		runID = fmt.Sprintf("%s-s%d", t.Name, t.Seed)
	}
	so := scorer.Options{BaseURL: f.proxy, Key: key, Run: runID, Model: t.Model, Endpoint: scorer.Endpoint(t.Endpoint),
		TopLogprobs: t.TopLogprobs, Concurrency: t.Concurrency}
	if f.replay {
		so.RunMode = "replay"
	}
	sc, err := scorer.New(so)
	if err != nil {
		return err
	}
	plan := search.PlanFor(t, 0)
	forecast := plan.Cost(f.price)
	fmt.Fprintf(out, "forecast: %d scorings (search %d, random baseline %d, evaluation %d) of at most %d prompt tokens each",
		plan.Judgements(), plan.Search, plan.Random, plan.Evaluation, plan.TokensPerJudgement)
	if f.price != (scorer.Price{}) {
		fmt.Fprintf(out, ": at most %.4f USD at the given prices, before the cache (an estimate; the provider's bill is the record)", forecast)
	}
	fmt.Fprintln(out)
	if t.SpendCapUSD > 0 && forecast > t.SpendCapUSD && !f.overCap && !f.replay {
		return fmt.Errorf("the forecast %.4f USD is over the task's spend_cap_usd %.4f: lower steps, prompts_per_step or examples_per_step, or pass --over-cap (the cache usually makes the real spend lower; the search still stops at the cap)", forecast, t.SpendCapUSD)
	}
	if err := os.MkdirAll(f.out, 0o755); err != nil {
		return err
	}
	start := time.Now()
	res, err := search.Run(ctx, search.Options{
		Task: t, Scorer: sc, Policy: search.Trainer{Trainer: trainer}, Vocab: vocab, SpendCapUSD: t.SpendCapUSD,
		Resume: resume, StopAfter: f.stopAfter, CheckpointEvery: f.checkpointEvery,
		Checkpoint: func(st *search.State) error {
			return policy.WriteFileAtomic(ckptPath, func(w io.Writer) error { return search.WriteState(w, st) })
		},
		Progress: func(p search.Progress) { printProgress(progress, p, start) },
	})
	fmt.Fprintln(progress)
	if errors.Is(err, search.ErrStopped) {
		fmt.Fprintf(out, "%v: %s\n", err, ckptPath)
		return nil
	}
	if err != nil {
		return err
	}
	wall := time.Since(start).Round(time.Second).String()
	files := []struct {
		name  string
		write func(io.Writer) error
	}{
		{"results.json", func(w io.Writer) error { return search.WriteResults(w, res) }},
		{"history.csv", func(w io.Writer) error { return search.WriteHistory(w, res.History) }},
		{"report.md", func(w io.Writer) error { return search.WriteReport(w, res, wall) }},
		{"learning-curve.png", func(w io.Writer) error { return search.WritePlot(w, res, search.PNG) }},
		{"learning-curve.svg", func(w io.Writer) error { return search.WritePlot(w, res, search.SVG) }},
	}
	for _, file := range files {
		if err := policy.WriteFileAtomic(filepath.Join(f.out, file.name), file.write); err != nil {
			return fmt.Errorf("write %s: %w", file.name, err)
		}
	}
	fmt.Fprint(out, search.Table(res))
	s := res.Spending
	fmt.Fprintf(out, "\nrun %s: %d scoring calls, %.1f%% of texts from the cache, %.6f USD reported by the proxy (an estimate), %s\nwrote %s\n",
		runID, s.Calls, 100*s.CacheShare(), s.CostUSD, wall, f.out)
	return nil
}

// printProgress redraws one status line: step, reward, accuracies,
// calls, cache share, spend and the time left at this pace.
func printProgress(w io.Writer, p search.Progress, start time.Time) {
	el := time.Since(start)
	eta := time.Duration(float64(el) / float64(p.Step) * float64(p.Steps-p.Step)).Round(time.Second)
	dev := "  -  "
	if p.DevAcc >= 0 {
		dev = fmt.Sprintf("%4.1f%%", 100*p.DevAcc)
	}
	bar := progressBar(p.Step, p.Steps, 20)
	fmt.Fprintf(w, "\r%s step %d/%d reward %+.2f train %4.1f%% dev %s calls %d cached %4.1f%% spent %.4f USD eta %s   ",
		bar, p.Step, p.Steps, p.MeanReward, 100*p.TrainAcc, dev, p.Calls.Calls, 100*p.Calls.CacheShare(), p.Calls.CostUSD, eta)
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

func readCheckpoint(path string, t *task.Task) (*search.State, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("--resume: %w", err)
	}
	defer f.Close()
	st, err := search.ReadState(f, t.Name, t.Seed)
	if err != nil {
		return nil, fmt.Errorf("--resume %s: %w", path, err)
	}
	return st, nil
}
