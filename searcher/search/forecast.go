package search

import (
	"strings"

	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

// Plan is how many judgements (prompt × example scorings) a search will
// make and about how many prompt tokens they hold.
type Plan struct {
	Search, Random, Evaluation int // judgements of each part
	TokensPerJudgement         int // an upper bound (see scorer.EstimateTokens)
}

// Judgements is the total.
func (p Plan) Judgements() int { return p.Search + p.Random + p.Evaluation }

// Cost is the plan's forecast at price: an estimate that ignores the
// cache (hits cost nothing), so a search that repeats itself pays less.
func (p Plan) Cost(price scorer.Price) float64 {
	return scorer.Forecast(p.Judgements(), p.TokensPerJudgement, price)
}

// PlanFor forecasts a search of t with the given dev-evaluation interval
// (0: the default, as Run uses).
func PlanFor(t *task.Task, evalEvery int) Plan {
	if evalEvery <= 0 {
		evalEvery = max(1, t.Steps/10)
	}
	perStep := t.PromptsPerStep * min(t.ExamplesPerStep, len(t.Train))
	evals := t.Steps / evalEvery
	if t.Steps%evalEvery != 0 {
		evals++
	}
	contenders := 4 + len(t.ManualPrompts) // rl, rl-best, empty, random and the manual prompts
	longest := 0
	for _, set := range [][]task.Example{t.Train, t.Dev, t.Test} {
		for _, e := range set {
			longest = max(longest, len(e.Text))
		}
	}
	// A prompt token is at most a word piece; count it generously.
	prompt := strings.Repeat("x", 12*t.PromptLength)
	return Plan{
		Search:             t.Steps * perStep,
		Random:             t.Steps * perStep,
		Evaluation:         evals*len(t.Dev) + contenders*(len(t.Train)+len(t.Dev)+len(t.Test)),
		TokensPerJudgement: scorer.EstimateTokens(t.Fill(strings.Repeat("x", longest), prompt)),
	}
}
