// Package judge has prompts judged on a task's lines for one contender of
// a search. A Panel fills the task's template, has the texts scored, reads
// each text's verdict with the task's reward, remembers every verdict it
// was given, and keeps the contender's tally: the judgements it asked for,
// the calls they took, what the proxy charged, and what the contender
// would have paid on its own (Tally.AloneUSD), which is what comparisons
// at equal spend measure.
package judge

import (
	"context"
	"errors"
	"fmt"
	"slices"

	"github.com/stintlab/stint/searcher/reward"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

// Scorer scores filled templates; *scorer.Client is one.
type Scorer interface {
	Score(ctx context.Context, texts []string) (scorer.Result, error)
}

// Verdict is one prompt's judgement on one line.
type Verdict struct {
	// Correct reports whether the true label won (see reward.Judge).
	Correct bool `json:"c,omitempty"`
	// Gap is P(true) − the largest P(other) over the verbalizers.
	Gap float64 `json:"g"`
	// Raw is the unnormalised reward (reward.Config.Raw): λ·Gap.
	Raw float64 `json:"r"`
}

// Tally is what a contender's judgements took.
type Tally struct {
	// Judgements counts prompt × line scorings asked of the scorer, a
	// repeat of one already judged included (the proxy answers it from
	// its cache).
	Judgements int `json:"judgements"`
	// New counts the texts among them this panel had not been given a
	// verdict for before: what the contender pays for on its own.
	New int `json:"new_texts"`
	// Calls, CostUSD and RunCostUSD sum the scorer's calls (see
	// scorer.Totals).
	Calls      int     `json:"calls"`
	CostUSD    float64 `json:"cost_usd"`
	RunCostUSD float64 `json:"run_cost_usd"`
	// AloneUSD is what the calls for new texts cost before the cache
	// (charged plus saved, as the proxy reported them; the recording's
	// figures on a replay): the contender's spend had it run alone on an
	// empty cache, where only its own repeats are hits.
	AloneUSD float64 `json:"alone_usd"`
	// Upstream counts the calls that reached the upstream
	// (scorer.Call.ReachedUpstream) and PriceUSD sums all calls' price
	// before the cache: the same calls sent straight to the upstream.
	Upstream int     `json:"upstream_calls,omitempty"`
	PriceUSD float64 `json:"price_usd,omitempty"`
	// Floored and Lookups count verbalizer look-ups that fell back to the
	// floor, and all look-ups (see reward.Step).
	Floored int `json:"floored"`
	Lookups int `json:"lookups"`
}

// Add returns the sum of two tallies.
func (t Tally) Add(o Tally) Tally {
	return Tally{
		Judgements: t.Judgements + o.Judgements, New: t.New + o.New, Calls: t.Calls + o.Calls,
		CostUSD: t.CostUSD + o.CostUSD, RunCostUSD: t.RunCostUSD + o.RunCostUSD, AloneUSD: t.AloneUSD + o.AloneUSD,
		Upstream: t.Upstream + o.Upstream, PriceUSD: t.PriceUSD + o.PriceUSD,
		Floored: t.Floored + o.Floored, Lookups: t.Lookups + o.Lookups,
	}
}

// Sub returns t minus an earlier reading of the same tally.
func (t Tally) Sub(o Tally) Tally {
	return Tally{
		Judgements: t.Judgements - o.Judgements, New: t.New - o.New, Calls: t.Calls - o.Calls,
		CostUSD: t.CostUSD - o.CostUSD, RunCostUSD: t.RunCostUSD - o.RunCostUSD, AloneUSD: t.AloneUSD - o.AloneUSD,
		Upstream: t.Upstream - o.Upstream, PriceUSD: t.PriceUSD - o.PriceUSD,
		Floored: t.Floored - o.Floored, Lookups: t.Lookups - o.Lookups,
	}
}

// Spend is the contender's spend on its own: AloneUSD when the proxy
// priced its calls, else the count of new texts (the same yardstick for
// every contender of one comparison, which is what matters there).
func (t Tally) Spend(priced bool) float64 {
	if priced {
		return t.AloneUSD
	}
	return float64(t.New)
}

// Panel judges prompts for one contender. It is not safe for concurrent
// use.
type Panel struct {
	t     *task.Task
	sc    Scorer
	known map[string]Verdict // by filled text
	tally Tally
}

// New returns an empty panel for task t scored by sc.
func New(t *task.Task, sc Scorer) *Panel {
	return &Panel{t: t, sc: sc, known: map[string]Verdict{}}
}

// Task returns the panel's task.
func (p *Panel) Task() *task.Task { return p.t }

// Tally returns the panel's tally so far.
func (p *Panel) Tally() Tally { return p.tally }

// Recall returns prompt's verdict on line e if the panel has one.
func (p *Panel) Recall(prompt string, e task.Example) (Verdict, bool) {
	v, ok := p.known[p.t.Fill(e.Text, prompt)]
	return v, ok
}

// Judge asks for every prompt's verdict on every line, repeats of texts it
// has judged before included (they are judgements too: the proxy answers
// them from its cache), and returns them as verdicts[prompt][line].
func (p *Panel) Judge(ctx context.Context, prompts []string, lines []task.Example) ([][]Verdict, error) {
	return p.judge(ctx, prompts, lines, true)
}

// Complete returns every prompt's verdict on every line like Judge, but
// asks only for the texts it has no verdict for: the rest come from its
// memory and are no judgements.
func (p *Panel) Complete(ctx context.Context, prompts []string, lines []task.Example) ([][]Verdict, error) {
	return p.judge(ctx, prompts, lines, false)
}

// Missing counts the (prompt, line) pairs Complete would ask for.
func (p *Panel) Missing(prompt string, lines []task.Example) int {
	n := 0
	for _, e := range lines {
		if _, ok := p.known[p.t.Fill(e.Text, prompt)]; !ok {
			n++
		}
	}
	return n
}

func (p *Panel) judge(ctx context.Context, prompts []string, lines []task.Example, repeats bool) ([][]Verdict, error) {
	texts := make([]string, 0, len(prompts)*len(lines))
	truth := make([]int, 0, cap(texts))
	for _, pr := range prompts {
		for _, e := range lines {
			texts = append(texts, p.t.Fill(e.Text, pr))
			truth = append(truth, p.t.LabelIndex(e.Label))
		}
	}
	// Texts new to the panel and texts it has judged go in separate calls,
	// so each call's price is wholly the contender's own or wholly a repeat.
	// A text twice in one request is a repeat the second time.
	var fresh, again []int
	queued := map[string]bool{}
	for i, s := range texts {
		if _, ok := p.known[s]; !ok && !queued[s] {
			fresh = append(fresh, i)
			queued[s] = true
		} else if repeats {
			again = append(again, i)
		}
	}
	if err := p.ask(ctx, texts, truth, fresh, true); err != nil {
		return nil, err
	}
	if err := p.ask(ctx, texts, truth, again, false); err != nil {
		return nil, err
	}
	out := make([][]Verdict, len(prompts))
	for i := range prompts {
		out[i] = make([]Verdict, len(lines))
		for j := range lines {
			out[i][j] = p.known[texts[i*len(lines)+j]]
		}
	}
	return out, nil
}

// ask scores texts[idx] and records their verdicts; fresh says they are
// new to the panel.
func (p *Panel) ask(ctx context.Context, texts []string, truth, idx []int, fresh bool) error {
	if len(idx) == 0 {
		return nil
	}
	batch := make([]string, len(idx))
	for k, i := range idx {
		batch[k] = texts[i]
	}
	res, err := p.sc.Score(ctx, batch)
	if err != nil {
		return err
	}
	if len(res.Top) != len(batch) {
		return fmt.Errorf("judge: %d answers for %d texts", len(res.Top), len(batch))
	}
	cfg := p.t.Reward
	verbalizers := p.t.Verbalizers()
	for k, i := range idx {
		probs, floored, err := cfg.Probabilities(res.Top[k], verbalizers)
		if err != nil {
			return fmt.Errorf("judge: text %d: %w", i, err)
		}
		j, err := reward.Judge(probs, truth[i])
		if err != nil {
			return fmt.Errorf("judge: text %d: %w", i, err)
		}
		p.known[texts[i]] = Verdict{Correct: j.Correct, Gap: j.Gap, Raw: cfg.Raw(j)}
		p.tally.Floored += floored
		p.tally.Lookups += len(verbalizers)
	}
	sum := scorer.Sum(res.Calls)
	p.tally.Judgements += len(batch)
	p.tally.Calls += sum.Calls
	p.tally.CostUSD += sum.CostUSD
	p.tally.RunCostUSD += sum.RunCostUSD
	p.tally.Upstream += sum.Upstream
	p.tally.PriceUSD += sum.PriceUSD
	if fresh {
		p.tally.New += len(batch)
		for _, c := range res.Calls {
			p.tally.AloneUSD += c.PriceUSD()
		}
	}
	return nil
}

// Accuracy is the share of vs that are correct (0 for none).
func Accuracy(vs []Verdict) float64 {
	if len(vs) == 0 {
		return 0
	}
	n := 0
	for _, v := range vs {
		if v.Correct {
			n++
		}
	}
	return float64(n) / float64(len(vs))
}

// MeanRaw is the mean raw reward of vs (0 for none).
func MeanRaw(vs []Verdict) float64 {
	if len(vs) == 0 {
		return 0
	}
	var s float64
	for _, v := range vs {
		s += v.Raw
	}
	return s / float64(len(vs))
}

// Memory is a panel's remembered verdicts and tally, for checkpoints.
type Memory struct {
	Verdicts map[string]Verdict `json:"verdicts"`
	Tally    Tally              `json:"tally"`
}

// Save returns a copy of the panel's memory.
func (p *Panel) Save() Memory {
	m := Memory{Verdicts: make(map[string]Verdict, len(p.known)), Tally: p.tally}
	for k, v := range p.known {
		m.Verdicts[k] = v
	}
	return m
}

// ErrMemory reports a saved memory that does not fit the panel.
var ErrMemory = errors.New("judge: unusable saved memory")

// Restore replaces the panel's memory with m.
func (p *Panel) Restore(m Memory) error {
	if m.Tally.New != len(m.Verdicts) {
		return fmt.Errorf("%w: %d verdicts for %d new texts", ErrMemory, len(m.Verdicts), m.Tally.New)
	}
	p.known = make(map[string]Verdict, len(m.Verdicts))
	for k, v := range m.Verdicts {
		p.known[k] = v
	}
	p.tally = m.Tally
	return nil
}

// Texts returns the filled texts the panel has verdicts for, sorted.
func (p *Panel) Texts() []string {
	out := make([]string, 0, len(p.known))
	for k := range p.known {
		out = append(out, k)
	}
	slices.Sort(out)
	return out
}
