// Package baseline has the searches a practitioner runs before trusting an
// RL search, each given a number of judgements and choosing its prompt by
// the rule every contender uses (package pick): best-of-N, random prompts
// each judged on the whole pool and the best kept; and successive
// halving, many random prompts judged on a few lines, the better half kept
// on twice as many, until the budget is spent. Both draw their prompts
// with Draw from the same actions as the search.
package baseline

import (
	"context"
	"fmt"
	"math/rand/v2"

	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/pick"
	"github.com/stintlab/stint/searcher/task"
)

// Vocabulary turns token ids into prompt text and lists the actions;
// search.LocalVocab is one.
type Vocabulary interface {
	Text(ids []int) string
	Actions() []int
}

// Draw returns a uniformly random prompt of length tokens from v's
// actions.
func Draw(rng *rand.Rand, v Vocabulary, length int) string {
	acts := v.Actions()
	ids := make([]int, length)
	for i := range ids {
		ids[i] = acts[rng.IntN(len(acts))]
	}
	return v.Text(ids)
}

// Candidate is one prompt best-of-N judged, and what it cost.
type Candidate struct {
	Prompt   string  `json:"prompt"`
	Accuracy float64 `json:"accuracy"`
	MeanRaw  float64 `json:"mean_raw_reward"`
	// AloneUSD and New are what judging it cost on its own (see
	// judge.Tally).
	AloneUSD float64 `json:"alone_usd"`
	New      int     `json:"new_texts"`
}

// Spend is the candidate's spend as judge.Tally.Spend reads it.
func (c Candidate) Spend(priced bool) float64 {
	return judge.Tally{AloneUSD: c.AloneUSD, New: c.New}.Spend(priced)
}

// Result is a baseline's chosen prompt.
type Result struct {
	Choice pick.Choice `json:"choice"`
	// Candidates counts the prompts drawn.
	Candidates int `json:"candidates"`
	// Judged lists best-of-N's candidates in the order drawn (empty for
	// halving), so the same run can be read at a smaller spend
	// (Affordable).
	Judged []Candidate `json:"judged,omitempty"`
}

// BestOfN draws budget/len(pool) random prompts, judges each on the whole
// pool and keeps the best (pick's ranking).
func BestOfN(ctx context.Context, p *judge.Panel, draw func() string, pool []task.Example, budget int) (Result, error) {
	if len(pool) == 0 {
		return Result{}, fmt.Errorf("baseline: best-of-N on an empty pool")
	}
	n := budget / len(pool)
	if n < 1 {
		return Result{}, fmt.Errorf("baseline: %d judgements do not judge one prompt on %d lines", budget, len(pool))
	}
	res := Result{Candidates: n}
	for range n {
		prompt := draw()
		before := p.Tally()
		vs, err := p.Complete(ctx, []string{prompt}, pool)
		if err != nil {
			return res, fmt.Errorf("baseline: best-of-N: %w", err)
		}
		cost := p.Tally().Sub(before)
		res.Judged = append(res.Judged, Candidate{Prompt: prompt, Accuracy: judge.Accuracy(vs[0]), MeanRaw: judge.MeanRaw(vs[0]), AloneUSD: cost.AloneUSD, New: cost.New})
	}
	res.Choice = BestOf(res.Judged, len(pool))
	return res, nil
}

// Affordable is how many of judged, taken in order, a spend of limit pays
// for (priced as judge.Tally.Spend), and what they cost.
func Affordable(judged []Candidate, limit float64, priced bool) (n int, spent float64) {
	for _, c := range judged {
		if spent+c.Spend(priced) > limit {
			break
		}
		spent += c.Spend(priced)
		n++
	}
	return n, spent
}

// BestOf is the best of judged by pick's ranking (accuracy, then mean raw
// reward, then the earlier); lines is the pool size they were judged on.
func BestOf(judged []Candidate, lines int) pick.Choice {
	var ch pick.Choice
	for i, c := range judged {
		if i == 0 || c.Accuracy > ch.Accuracy || c.Accuracy == ch.Accuracy && c.MeanRaw > ch.MeanRaw {
			ch = pick.Choice{Prompt: c.Prompt, Accuracy: c.Accuracy, MeanRaw: c.MeanRaw, Lines: lines}
		}
	}
	return ch
}

// Halving draws as many random prompts as a halving from first lines each
// can judge within budget, and chooses among them by pick.Halve.
func Halving(ctx context.Context, p *judge.Panel, draw func() string, pool []task.Example, budget, first int) (Result, error) {
	n := pick.CandidatesFor(len(pool), first, budget)
	if n < 1 {
		return Result{}, fmt.Errorf("baseline: %d judgements do not start a halving from %d lines", budget, first)
	}
	arms := make([]string, n)
	for i := range arms {
		arms[i] = draw()
	}
	ch, err := pick.Halve(ctx, p, arms, pool, first)
	if err != nil {
		return Result{}, fmt.Errorf("baseline: halving: %w", err)
	}
	return Result{Choice: ch, Candidates: n}, nil
}
