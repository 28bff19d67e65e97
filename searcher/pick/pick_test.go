package pick_test

import (
	"context"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/pick"
	"github.com/stintlab/stint/searcher/scorer/scorertest"
)

// Schedules hand-worked from the doubling rule: depths first, 2·first, …
// capped at m, one more round per halving of the candidates.
func TestDepthsAndCost(t *testing.T) {
	tests := []struct {
		n, m, first int
		depths      []int
		cost        int
	}{
		// 8 candidates on 4 lines, 4 on 8, 2 on 16, 1 left: 32 + 4·4 + 2·8.
		{8, 60, 4, []int{4, 8, 16}, 32 + 16 + 16},
		// Capped at the pool: 10 → 5 → 3 → 2 on 4, 8, 16, 20 lines.
		{10, 20, 4, []int{4, 8, 16, 20}, 40 + 5*4 + 3*8 + 2*4},
		// best-of-N: one round on the whole pool.
		{5, 60, 60, []int{60}, 300},
		{1, 60, 4, []int{4}, 4},
		{0, 60, 4, nil, 0},
	}
	for _, tt := range tests {
		assert.Equal(t, tt.depths, pick.Depths(tt.n, tt.m, tt.first), "Depths(%d, %d, %d)", tt.n, tt.m, tt.first)
		assert.Equal(t, tt.cost, pick.Cost(tt.n, tt.m, tt.first), "Cost(%d, %d, %d)", tt.n, tt.m, tt.first)
	}
}

func TestBudgetInverses(t *testing.T) {
	for _, budget := range []int{0, 3, 64, 1000, 15360} {
		for _, first := range []int{1, 4, 60} {
			n := pick.CandidatesFor(60, first, budget)
			assert.LessOrEqual(t, pick.Cost(n, 60, first), budget, "CandidatesFor(60, %d, %d) = %d fits", first, budget, n)
			assert.Greater(t, pick.Cost(n+1, 60, first), budget, "one more candidate does not fit")
		}
		for _, n := range []int{1, 32, 64} {
			f := pick.FirstFor(n, 60, budget)
			if f == 0 {
				assert.Greater(t, pick.Cost(n, 60, 1), budget)
				continue
			}
			assert.LessOrEqual(t, pick.Cost(n, 60, f), budget)
		}
	}
}

// TestHalveOnTheModel: with first = the pool's size a choice is best-of-N,
// and it takes the candidate with the best accuracy (the earliest on a
// tie); a halving asks for no more than FirstWithin promised, and for
// nothing it already holds.
func TestHalveOnTheModel(t *testing.T) {
	rig := scorertest.Start(t)
	tk := rig.Task(t)
	ctx := context.Background()
	pool := append(slices.Clone(tk.Train), tk.Dev...)
	arms := []string{"the big", "play that day They play", "Lily is a girl. Tim is a boy.", "A story", "happ he she her his"}

	p := judge.New(tk, rig.Scorer(t, tk))
	ch, err := pick.Halve(ctx, p, append(arms, arms[0]), pool, len(pool))
	require.NoError(t, err)
	vs, err := p.Complete(ctx, arms, pool)
	require.NoError(t, err)
	best := 0
	for i, v := range vs {
		if a, b := judge.Accuracy(v), judge.Accuracy(vs[best]); a > b || a == b && judge.MeanRaw(v) > judge.MeanRaw(vs[best]) {
			best = i
		}
	}
	assert.Equal(t, arms[best], ch.Prompt, "best-of-N takes the most accurate")
	assert.Equal(t, judge.Accuracy(vs[best]), ch.Accuracy)
	assert.Equal(t, len(pool), ch.Lines)
	assert.Len(t, ch.Rounds, 1)
	assert.Equal(t, len(arms)*len(pool), p.Tally().Judgements, "a repeated candidate is judged once")

	q := judge.New(tk, rig.Scorer(t, tk))
	_, err = q.Judge(ctx, arms[:2], pool[:10]) // some verdicts held already
	require.NoError(t, err)
	const budget = 90
	first := pick.FirstWithin(q, arms, pool, budget)
	require.Positive(t, first)
	before := q.Tally().Judgements
	ch, err = pick.Halve(ctx, q, arms, pool, first)
	require.NoError(t, err)
	asked := q.Tally().Judgements - before
	assert.LessOrEqual(t, asked, budget, "FirstWithin's bound holds")
	assert.Less(t, asked, pick.Cost(len(arms), len(pool), first), "held verdicts are not asked again")
	assert.Contains(t, arms, ch.Prompt)

	_, err = pick.Halve(ctx, q, nil, pool, 4)
	assert.ErrorIs(t, err, pick.ErrNoCandidates)
}
