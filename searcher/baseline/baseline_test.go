package baseline_test

import (
	"context"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/baseline"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/pick"
	"github.com/stintlab/stint/searcher/scorer/scorertest"
	"github.com/stintlab/stint/searcher/search"
)

// TestBaselinesKeepToTheirBudget: best-of-N judges budget/len(pool)
// prompts on the whole pool and keeps the best of them; halving never asks
// for more than its budget; both are refused a budget too small to judge
// anything.
func TestBaselinesKeepToTheirBudget(t *testing.T) {
	rig := scorertest.Start(t)
	tk := rig.Task(t)
	vocab := search.NewLocalVocab(rig.Model.Tokenizer(), tk.AllowList)
	pool := append(slices.Clone(tk.Train), tk.Dev...)
	ctx := context.Background()
	draw := func(seed uint64) func() string {
		rng := rand.New(rand.NewPCG(seed, 1))
		return func() string { return baseline.Draw(rng, vocab, tk.PromptLength) }
	}

	tests := []struct {
		name   string
		budget int
		run    func(*judge.Panel, int) (baseline.Result, error)
		want   int // judgements, or -1 for at most the budget
	}{
		{"best-of-N", 7*60 + 59, func(p *judge.Panel, b int) (baseline.Result, error) {
			return baseline.BestOfN(ctx, p, draw(1), pool, b)
		}, 7 * 60},
		{"halving from 4 lines", 600, func(p *judge.Panel, b int) (baseline.Result, error) {
			return baseline.Halving(ctx, p, draw(2), pool, b, 4)
		}, -1},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			p := judge.New(tk, rig.Scorer(t, tk))
			res, err := tt.run(p, tt.budget)
			require.NoError(t, err)
			got := p.Tally().Judgements
			if tt.want >= 0 {
				assert.Equal(t, tt.want, got)
			}
			assert.LessOrEqual(t, got, tt.budget)
			assert.NotEmpty(t, res.Choice.Prompt)
			_, err = tt.run(judge.New(tk, rig.Scorer(t, tk)), 3)
			assert.Error(t, err, "a budget of 3 judgements")
		})
	}
}

// TestAffordableAndBestOf: reading best-of-N at a smaller spend keeps the
// longest prefix the spend pays for, and the best of it by pick's ranking.
// Hand-made candidates.
func TestAffordableAndBestOf(t *testing.T) {
	cands := []baseline.Candidate{
		{Prompt: "a", Accuracy: 0.5, MeanRaw: 0.1, AloneUSD: 0.2, New: 60},
		{Prompt: "b", Accuracy: 0.7, MeanRaw: -0.1, AloneUSD: 0.2, New: 60},
		{Prompt: "c", Accuracy: 0.7, MeanRaw: 0.3, AloneUSD: 0.2, New: 60},
		{Prompt: "d", Accuracy: 0.9, MeanRaw: 0.0, AloneUSD: 0.2, New: 60},
	}
	tests := []struct {
		limit  float64
		priced bool
		n      int
		best   string
	}{
		{0.65, true, 3, "c"}, // a, b, c: b and c tie on accuracy, c has the higher raw reward
		{0.8, true, 4, "d"},
		{0.1, true, 0, ""},
		{130, false, 2, "b"}, // in texts: 60 + 60
	}
	for _, tt := range tests {
		n, spent := baseline.Affordable(cands, tt.limit, tt.priced)
		assert.Equal(t, tt.n, n, "limit %v", tt.limit)
		assert.LessOrEqual(t, spent, tt.limit)
		assert.Equal(t, tt.best, baseline.BestOf(cands[:n], 60).Prompt, "limit %v", tt.limit)
	}
	assert.Equal(t, pick.Choice{}, baseline.BestOf(nil, 60))
}
