package search

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

// Job is one search as a user asks for it.
type Job struct {
	TaskPath string // the task file
	Proxy    string // the proxy's base URL, version path included
	Key      string // the team's client key
	Run      string // the run id the calls are recorded under; "" means TASK-sSEED
	Out      string // the output directory
	// Replay answers every call from the run's journal.
	Replay bool
	// Resume continues from the last checkpoint (Out/checkpoint.json, or
	// Checkpoints' when set).
	Resume bool
	// Checkpoints, when set, keeps the checkpoints instead of
	// Out/checkpoint.json (a shared store, so another process can resume
	// the search); nil means the file.
	Checkpoints Checkpoints
	// Price overrides the task's prices for the forecast; OverCap starts
	// a search whose forecast is over the task's spend cap, or that has a
	// cap and no price (see CheckCap).
	Price   PriceOverride
	OverCap bool
	// CheckpointEvery and StopAfter are as in Options.
	CheckpointEvery, StopAfter int
	// Backbone identifies the model file of the backbone in results.json
	// (IdentifyBackbone, computed once by the caller).
	Backbone Backbone
	// Seed and Steps, when set, replace the task file's seed and steps.
	Seed  *int64
	Steps int
}

// LoadTask loads j's task with the model's tokenizer and j's overrides
// applied.
func (j Job) LoadTask(m *localmodel.Model) (*task.Task, error) {
	t, err := task.Load(j.TaskPath, task.NewLocalTokenizer(m.Tokenizer()))
	if err != nil {
		return nil, err
	}
	if j.Seed != nil {
		t.Seed = *j.Seed
	}
	if j.Steps < 0 {
		return nil, fmt.Errorf("search: steps must be positive, got %d", j.Steps)
	}
	if j.Steps > 0 {
		t.Steps = j.Steps
	}
	return t, nil
}

// Outcome is what a job did.
type Outcome struct {
	Results  Results
	Run      string
	Plan     Plan
	Pricing  Pricing // the task's prices with Job.Price over them
	Forecast float64 // USD at Pricing; 0 when the price is not known
	Wall     time.Duration
	Stopped  bool // StopAfter ended it; its checkpoint resumes it
	// Partial is set when the search failed part way and kept what it had
	// finished: results.json with the contenders found so far
	// (Results.Stopped says why) and, when Results.Resumable, a
	// checkpoint that --resume goes on from.
	Partial bool
}

// Checkpoints keep a search's checkpoint where another process can read
// it. Save replaces the last checkpoint with st (written by WriteState);
// its error ends the search. Load returns the last one saved, or an error
// wrapping fs.ErrNotExist when there is none.
type Checkpoints interface {
	Save(st *State) error
	Load() (io.Reader, error)
}

// CheckpointFile is the checkpoint's name in a job's output directory.
const CheckpointFile = "checkpoint.json"

// RunJob runs j with model m as the policy's backbone: it loads the task,
// forecasts the cost (refusing a forecast over the task's cap unless
// j.OverCap), searches, checkpoints, and writes results.json, history.csv,
// report.md and the learning curve to j.Out. log receives a few lines for
// people (forecast, resume); progress, when set, every step.
func RunJob(ctx context.Context, m *localmodel.Model, j Job, log io.Writer, progress func(Progress)) (Outcome, error) {
	var oc Outcome
	t, err := j.LoadTask(m)
	if err != nil {
		return oc, err
	}
	vocab := NewLocalVocab(m.Tokenizer(), t.AllowList)
	if len(vocab.Actions()) == 0 {
		return oc, errors.New("search: the task's allow_list admits no token of the model")
	}
	if t.AutoFactor {
		t.Reward.Factor = task.AutoRewardFactor(t.Reward.Kind, t.PromptLength, len(vocab.Actions()))
	}
	backbone, err := policy.NewLocal(m, policy.LocalOptions{})
	if err != nil {
		return oc, err
	}
	ckptPath := filepath.Join(j.Out, CheckpointFile)
	var resume *State
	var trainer *policy.Trainer
	if j.Resume {
		if j.Checkpoints != nil {
			ckptPath = "the shared checkpoint"
			resume, err = loadCheckpoint(j.Checkpoints, t)
		} else {
			resume, err = readCheckpoint(ckptPath, t)
		}
		if err != nil {
			return oc, err
		}
		if trainer, err = policy.Load(resume.PolicyReader(), backbone); err != nil {
			return oc, fmt.Errorf("search: resume %s: %w", ckptPath, err)
		}
		fmt.Fprintf(log, "resuming after step %d from %s\n", resume.Step, ckptPath)
	} else if trainer, err = policy.NewTrainer(backbone, policy.Config{
		PromptLength: t.PromptLength, Seed: uint64(t.Seed), Actions: vocab.Actions(),
		LearningRate: t.Policy.LearningRate, TopK: t.Policy.TopK, Polyak: t.Policy.TargetRate,
	}); err != nil {
		return oc, err
	}
	oc.Run = j.Run
	if oc.Run == "" {
		oc.Run = fmt.Sprintf("%s-s%d", t.Name, t.Seed)
	}
	memo := scorer.NewMemo()
	so := scorer.Options{BaseURL: j.Proxy, Key: j.Key, Run: oc.Run, Model: t.Model, Endpoint: scorer.Endpoint(t.Endpoint),
		TopLogprobs: t.TopLogprobs, Concurrency: t.Concurrency, Memo: memo}
	if j.Replay {
		so.RunMode = "replay"
	}
	sc, err := scorer.New(so)
	if err != nil {
		return oc, err
	}
	oc.Plan = PlanFor(t, 0)
	oc.Pricing = PricingFor(t.Prices, j.Price)
	fmt.Fprintf(log, "forecast: %d scorings (search %d, baselines %d, evaluation %d) of at most %d prompt tokens each",
		oc.Plan.Judgements(), oc.Plan.Search, oc.Plan.Baselines, oc.Plan.Evaluation, oc.Plan.TokensPerJudgement)
	if oc.Pricing.Known() {
		oc.Forecast = oc.Plan.Cost(oc.Pricing.Price)
		fmt.Fprintf(log, ": at most %.4f USD at %g / %g USD per million input / output tokens, before the cache (an estimate; the provider's bill is the record)",
			oc.Forecast, oc.Pricing.Price.InputPerMillion, oc.Pricing.Price.OutputPerMillion)
	} else {
		fmt.Fprint(log, "; no price, so no USD forecast")
	}
	fmt.Fprintln(log)
	if !j.Replay { // a replay makes no upstream call: it spends nothing
		note, err := CheckCap(t.SpendCapUSD, oc.Forecast, oc.Pricing, j.OverCap)
		if err != nil {
			return oc, err
		}
		if note != "" {
			fmt.Fprintln(log, note)
		}
	}
	if err := os.MkdirAll(j.Out, 0o755); err != nil {
		return oc, err
	}
	start := time.Now()
	res, err := Run(ctx, Options{
		Task: t, Scorer: sc, Policy: Trainer{Trainer: trainer}, Vocab: vocab, SpendCapUSD: t.SpendCapUSD, Backbone: j.Backbone,
		Resume: resume, StopAfter: j.StopAfter, CheckpointEvery: j.CheckpointEvery, Progress: progress, Memo: memo,
		Checkpoint: func(st *State) error {
			if j.Checkpoints != nil {
				return j.Checkpoints.Save(st)
			}
			return policy.WriteFileAtomic(ckptPath, func(w io.Writer) error { return WriteState(w, st) })
		},
	})
	oc.Results, oc.Wall = res, time.Since(start)
	if errors.Is(err, ErrStopped) {
		oc.Stopped = true
		return oc, nil
	}
	if err != nil {
		if res.Stopped != "" {
			if werr := policy.WriteFileAtomic(filepath.Join(j.Out, "results.json"), func(w io.Writer) error { return WriteResults(w, res) }); werr != nil {
				return oc, fmt.Errorf("%w (and results.json could not be written: %w)", err, werr)
			}
			oc.Partial = true
		}
		return oc, err
	}
	return oc, writeOutputs(j.Out, res, oc.Wall.Round(time.Second).String())
}

func writeOutputs(dir string, res Results, wall string) error {
	files := []struct {
		name  string
		write func(io.Writer) error
	}{
		{"results.json", func(w io.Writer) error { return WriteResults(w, res) }},
		{"history.csv", func(w io.Writer) error { return WriteHistory(w, res.History) }},
		{"report.md", func(w io.Writer) error { return WriteReport(w, res, wall) }},
		{"learning-curve.png", func(w io.Writer) error { return WritePlot(w, res, PNG) }},
		{"learning-curve.svg", func(w io.Writer) error { return WritePlot(w, res, SVG) }},
	}
	for _, f := range files {
		if err := policy.WriteFileAtomic(filepath.Join(dir, f.name), f.write); err != nil {
			return fmt.Errorf("search: write %s: %w", f.name, err)
		}
	}
	return nil
}

func readCheckpoint(path string, t *task.Task) (*State, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("search: resume: %w", err)
	}
	defer f.Close()
	st, err := ReadState(f, t.Name, t.Seed)
	if err != nil {
		return nil, fmt.Errorf("search: resume %s: %w", path, err)
	}
	return st, nil
}

func loadCheckpoint(c Checkpoints, t *task.Task) (*State, error) {
	r, err := c.Load()
	if err != nil {
		return nil, fmt.Errorf("search: resume: %w", err)
	}
	st, err := ReadState(r, t.Name, t.Seed)
	if err != nil {
		return nil, fmt.Errorf("search: resume from the shared checkpoint: %w", err)
	}
	return st, nil
}
