// Package compare runs the RL search and its baselines over tasks × seeds
// through the proxy, as a user would, and sums up how they did: at equal
// judgements (every baseline given the search's budget), and at equal
// spend (best-of-N and halving given what the search paid on its own,
// cache hits free), with the headroom survey of each task beside them.
// Every finished part is written to the output directory as it ends, so
// an interrupted comparison resumes where it stopped.
package compare

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/baseline"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/survey"
	"github.com/stintlab/stint/searcher/task"
)

// The equal-spend contenders' methods.
const (
	BestOfNAtSpend = task.BestOfN + "@spend"
	HalvingAtSpend = task.Halving + "@spend"
)

// Options configure a comparison.
type Options struct {
	// Tasks are task files; Seeds the seeds each is searched with.
	Tasks []string
	Seeds []int64
	// Out is the directory every part is written to (and resumed from).
	Out string
	// Proxy, Key, Price and OverCap are as in search.Job.
	Proxy   string
	Key     string
	Price   search.PriceOverride
	OverCap bool
	// Survey is how many random prompts each task's headroom survey
	// judges (0: none).
	Survey int
	// Backbone names the model file in results.json.
	Backbone search.Backbone
	// Log receives a line per finished part; Progress, when set, the
	// state as it goes.
	Log      io.Writer
	Progress func(Progress)
	// Now reads the clock (nil: time.Now).
	Now func() time.Time
}

// Progress is how far a comparison is.
type Progress struct {
	// Done of Total parts (a task's survey, a task × seed search) are
	// finished; Part names the one running and Search its progress.
	Done, Total int
	Part        string
	Search      search.Progress
	// ETA is the time the parts left take at the pace of those this
	// process ran (0 before the first).
	ETA time.Duration
}

// Row is one contender of one search.
type Row struct {
	Method   string  `json:"method"`
	Prompt   string  `json:"prompt"`
	TrainAcc float64 `json:"train_accuracy"`
	DevAcc   float64 `json:"dev_accuracy"`
	TestAcc  float64 `json:"test_accuracy"`
	// Judgements and Spend are what finding the prompt took; Spend is on
	// its own (judge.Tally.Spend: USD before the cache when the proxy
	// prices calls, else texts paid for).
	Judgements int     `json:"judgements"`
	Spend      float64 `json:"spend"`
}

// Cell is one task × seed.
type Cell struct {
	Task   string  `json:"task"`
	Seed   int64   `json:"seed"`
	Priced bool    `json:"priced"` // spend is in USD, else in texts paid for
	Budget int     `json:"judgement_budget"`
	Rows   []Row   `json:"rows"`
	Wall   float64 `json:"wall_seconds"`
}

// Row returns the cell's row of method.
func (c Cell) Row(method string) (Row, bool) {
	for _, r := range c.Rows {
		if r.Method == method {
			return r, true
		}
	}
	return Row{}, false
}

// Result is a whole comparison.
type Result struct {
	Cells   []Cell          `json:"cells"`
	Surveys []survey.Report `json:"surveys"`
	Summary Summary         `json:"summary"`
	Wall    float64         `json:"wall_seconds"`
}

// Run compares on m, the policy's backbone.
func Run(ctx context.Context, m *localmodel.Model, o Options) (Result, error) {
	if len(o.Tasks) == 0 || len(o.Seeds) == 0 {
		return Result{}, errors.New("compare: give at least one task and one seed")
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Log == nil {
		o.Log = io.Discard
	}
	if err := os.MkdirAll(o.Out, 0o755); err != nil {
		return Result{}, err
	}
	r := &runner{o: o, m: m, start: o.Now()}
	r.total = len(o.Tasks) * len(o.Seeds)
	if o.Survey > 0 {
		r.total += len(o.Tasks)
	}
	var res Result
	for _, path := range o.Tasks {
		t, err := search.Job{TaskPath: path}.LoadTask(m)
		if err != nil {
			return res, err
		}
		if o.Survey > 0 {
			rep, err := r.survey(ctx, path, t)
			if err != nil {
				return res, err
			}
			res.Surveys = append(res.Surveys, rep)
		}
		for _, seed := range o.Seeds {
			c, err := r.cell(ctx, path, t.Name, seed)
			if err != nil {
				return res, err
			}
			res.Cells = append(res.Cells, c)
		}
	}
	res.Summary = Summarize(res.Cells, res.Surveys)
	res.Wall = o.Now().Sub(r.start).Seconds()
	return res, writeJSON(filepath.Join(o.Out, "compare.json"), res)
}

// runner is one comparison's state.
type runner struct {
	o     Options
	m     *localmodel.Model
	start time.Time
	// done counts finished parts, ran those this process ran, in ranFor.
	done, ran, total int
	ranFor           time.Duration
}

func (r *runner) progress(part string, sp search.Progress) {
	if r.o.Progress == nil {
		return
	}
	var eta time.Duration
	if r.ran > 0 {
		eta = time.Duration(float64(r.ranFor) / float64(r.ran) * float64(r.total-r.done)).Round(time.Second)
	}
	r.o.Progress(Progress{Done: r.done, Total: r.total, Part: part, Search: sp, ETA: eta})
}

// finished counts a part, and its time when this process ran it.
func (r *runner) finished(ran bool, took time.Duration) {
	r.done++
	if ran {
		r.ran++
		r.ranFor += took
	}
}

func (r *runner) scorer(t *task.Task, run string) (*scorer.Client, error) {
	return scorer.New(scorer.Options{BaseURL: r.o.Proxy, Key: r.o.Key, Run: run, Model: t.Model, Endpoint: scorer.Endpoint(t.Endpoint),
		TopLogprobs: t.TopLogprobs, Concurrency: t.Concurrency})
}

// survey runs (or reads back) the headroom survey of t.
func (r *runner) survey(ctx context.Context, path string, t *task.Task) (survey.Report, error) {
	file := filepath.Join(r.o.Out, t.Name, "headroom.json")
	var rep survey.Report
	if readJSON(file, &rep) == nil {
		r.finished(false, 0)
		return rep, nil
	}
	begin := r.o.Now()
	sc, err := r.scorer(t, fmt.Sprintf("compare-%s-headroom", t.Name))
	if err != nil {
		return rep, err
	}
	vocab := search.NewLocalVocab(r.m.Tokenizer(), t.AllowList)
	part := t.Name + " headroom"
	rep, err = survey.Run(ctx, t, vocab, judge.New(t, sc), survey.Options{Prompts: r.o.Survey, Seed: 1, Progress: func(done, total int) {
		r.progress(part, search.Progress{Phase: "headroom", Done: done, Total: total})
	}})
	if err != nil {
		return rep, fmt.Errorf("compare: %s: %w", part, err)
	}
	if err := writeJSON(file, rep); err != nil {
		return rep, err
	}
	r.finished(true, r.o.Now().Sub(begin))
	fmt.Fprintf(r.o.Log, "%s: empty %.1f%%, random prompts %.1f%% ± %.1f on train+dev, best %.1f%% (test %.1f%%)\n",
		part, 100*rep.Empty, 100*rep.Mean, 100*rep.SD, 100*rep.Best.Accuracy, 100*rep.BestTest)
	return rep, nil
}

// cellFile holds a finished cell; the search's own outputs are beside it.
const cellFile = "cell.json"

// cell runs (or reads back, or resumes) one task × seed.
func (r *runner) cell(ctx context.Context, path, name string, seed int64) (Cell, error) {
	dir := filepath.Join(r.o.Out, name, fmt.Sprintf("s%d", seed))
	var c Cell
	if readJSON(filepath.Join(dir, cellFile), &c) == nil {
		r.finished(false, 0)
		return c, nil
	}
	begin := r.o.Now()
	part := fmt.Sprintf("%s seed %d", name, seed)
	_, statErr := os.Stat(filepath.Join(dir, search.CheckpointFile))
	job := search.Job{TaskPath: path, Proxy: r.o.Proxy, Key: r.o.Key, Run: fmt.Sprintf("compare-%s-s%d", name, seed), Out: dir,
		Price: r.o.Price, OverCap: r.o.OverCap, Backbone: r.o.Backbone, Seed: &seed, Resume: statErr == nil}
	oc, err := search.RunJob(ctx, r.m, job, io.Discard, func(p search.Progress) { r.progress(part, p) })
	if err != nil {
		return c, fmt.Errorf("compare: %s: %w", part, err)
	}
	t, err := job.LoadTask(r.m)
	if err != nil {
		return c, err
	}
	c, err = r.atSpend(ctx, t, job.Run, oc.Results)
	if err != nil {
		return c, fmt.Errorf("compare: %s: %w", part, err)
	}
	c.Wall = r.o.Now().Sub(begin).Seconds()
	if err := writeJSON(filepath.Join(dir, cellFile), c); err != nil {
		return c, err
	}
	r.finished(true, r.o.Now().Sub(begin))
	rl, _ := c.Row(search.MethodRL)
	fmt.Fprintf(r.o.Log, "%s: rl %.1f%% test (%q) in %.0f s\n", part, 100*rl.TestAcc, rl.Prompt, c.Wall)
	return c, nil
}

// atSpend turns a search's results into a cell, adding best-of-N and
// halving given what the RL search paid on its own.
func (r *runner) atSpend(ctx context.Context, t *task.Task, run string, res search.Results) (Cell, error) {
	c := Cell{Task: res.Task, Seed: res.Seed, Budget: res.Budget}
	for _, ct := range res.Ranking {
		c.Priced = c.Priced || ct.SearchAloneUSD > 0
	}
	spend := func(ct search.Contender) float64 {
		if c.Priced {
			return ct.SearchAloneUSD
		}
		return float64(ct.SearchNewTexts)
	}
	for _, ct := range res.Ranking {
		c.Rows = append(c.Rows, Row{Method: ct.Method, Prompt: ct.Prompt, TrainAcc: ct.TrainAcc, DevAcc: ct.DevAcc, TestAcc: ct.TestAcc,
			Judgements: ct.Calls, Spend: spend(ct)})
	}
	rl, ok := res.Contender(search.MethodRL)
	if !ok {
		return c, errors.New("the search has no rl contender")
	}
	limit := spend(rl)
	sc, err := r.scorer(t, run+"-at-spend")
	if err != nil {
		return c, err
	}
	eval := judge.New(t, sc)
	add := func(method, prompt string, judgements int, spent float64) error {
		row := Row{Method: method, Prompt: prompt, Judgements: judgements, Spend: spent}
		for _, x := range []struct {
			set []task.Example
			acc *float64
		}{{t.Train, &row.TrainAcc}, {t.Dev, &row.DevAcc}, {t.Test, &row.TestAcc}} {
			*x.acc = -1
			if len(x.set) == 0 {
				continue
			}
			vs, err := eval.Complete(ctx, []string{prompt}, x.set)
			if err != nil {
				return err
			}
			*x.acc = judge.Accuracy(vs[0])
		}
		c.Rows = append(c.Rows, row)
		return nil
	}
	if cands := res.Extras.BestOfN; len(cands) > 0 {
		// Best-of-N read at the search's spend: the best of the prompts
		// that spend would have bought, in the order they were drawn.
		n, spent := baseline.Affordable(cands, limit, c.Priced)
		if n > 0 {
			ch := baseline.BestOf(cands[:n], res.Extras.Pool)
			if err := add(BestOfNAtSpend, ch.Prompt, n*res.Extras.Pool, spent); err != nil {
				return c, err
			}
		}
	}
	if hv, ok := res.Contender(task.Halving); ok && hv.SearchNewTexts > 0 {
		// Halving given the search's spend: a halving's texts are all new,
		// so it buys limit / (its price per text) judgements.
		budget := int(limit / (spend(hv) / float64(hv.SearchNewTexts)))
		p := judge.New(t, sc)
		pool := search.Pool(t, t.Seed, search.StreamHalving)
		vocab := search.NewLocalVocab(r.m.Tokenizer(), t.AllowList)
		b, err := baseline.Halving(ctx, p, search.Drawer(t, vocab, t.Seed, search.StreamHalving), pool, budget, t.Baselines.HalvingFirst)
		if err != nil {
			return c, err
		}
		if err := add(HalvingAtSpend, b.Choice.Prompt, p.Tally().Judgements, p.Tally().Spend(c.Priced)); err != nil {
			return c, err
		}
	}
	return c, nil
}

func writeJSON(path string, v any) error {
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		return err
	}
	return policy.WriteFileAtomic(path, func(w io.Writer) error {
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(v)
	})
}

func readJSON(path string, v any) error {
	b, err := os.ReadFile(path)
	if err != nil {
		return err
	}
	return json.Unmarshal(b, v)
}
