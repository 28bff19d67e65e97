package compare

import (
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/survey"
)

func cell(task string, seed int64, accs map[string]float64) Cell {
	c := Cell{Task: task, Seed: seed}
	for _, m := range []string{"rl", "best-of-n", "halving", BestOfNAtSpend, HalvingAtSpend, "empty"} {
		c.Rows = append(c.Rows, Row{Method: m, TestAcc: accs[m], Judgements: 100})
	}
	c.Rows = append(c.Rows, Row{Method: "manual", Prompt: "Say it", TestAcc: 0.5})
	return c
}

// TestSummarize: per-task means over seeds, the strongest baseline per
// task, the suite's mean of the tasks' means, and the goal's checks, on
// hand-made accuracies whose figures are worked by hand in the comments.
func TestSummarize(t *testing.T) {
	cells := []Cell{
		// Task a: rl 0.70 and 0.80 (mean 0.75), best-of-n 0.70, halving
		// 0.72 and 0.74 (0.73, the strongest): rl +2 points.
		cell("a", 1, map[string]float64{"rl": 0.70, "best-of-n": 0.70, "halving": 0.72, BestOfNAtSpend: 0.60, HalvingAtSpend: 0.65, "empty": 0.5}),
		cell("a", 2, map[string]float64{"rl": 0.80, "best-of-n": 0.70, "halving": 0.74, BestOfNAtSpend: 0.60, HalvingAtSpend: 0.67, "empty": 0.5}),
		// Task b: rl 0.40, best-of-n 0.45 (the strongest): rl −5 points,
		// and below the empty prompt's 0.42.
		cell("b", 1, map[string]float64{"rl": 0.40, "best-of-n": 0.45, "halving": 0.44, BestOfNAtSpend: 0.41, HalvingAtSpend: 0.30, "empty": 0.42}),
		cell("b", 2, map[string]float64{"rl": 0.40, "best-of-n": 0.45, "halving": 0.44, BestOfNAtSpend: 0.41, HalvingAtSpend: 0.30, "empty": 0.42}),
	}
	s := Summarize(cells, []survey.Report{{Task: "a", BestTest: 0.76}, {Task: "b", BestTest: 0.50}})
	require.Len(t, s.Tasks, 2)
	a, b := s.Tasks[0], s.Tasks[1]
	assert.InDelta(t, 0.75, a.Methods["rl"].Mean, 1e-12)
	assert.InDelta(t, 0.05, a.Methods["rl"].SD, 1e-12, "population sd of 0.70 and 0.80")
	assert.Equal(t, "halving", a.Strongest)
	assert.InDelta(t, 0.02, a.VsStrongest, 1e-12)
	assert.Equal(t, HalvingAtSpend, a.StrongestAtSpend)
	assert.InDelta(t, 0.09, a.VsStrongestAtSpend, 1e-12, "0.75 - 0.66")
	assert.InDelta(t, -0.01, a.VsSurvey, 1e-12)
	assert.Equal(t, "best-of-n", b.Strongest)
	assert.InDelta(t, -0.05, b.VsStrongest, 1e-12)
	assert.Contains(t, a.Methods, "manual: Say it")

	assert.InDelta(t, 0.575, s.Methods["rl"].Mean, 1e-12, "mean of 0.75 and 0.40")
	assert.InDelta(t, 0.59, s.Strongest.Mean, 1e-12, "mean of 0.73 and 0.45")
	g := s.Goal
	assert.Equal(t, 1, g.Ahead)
	assert.InDelta(t, -0.05, g.WorstVsStrongest, 1e-12)
	assert.Equal(t, []string{"b"}, g.BelowEmpty)
	assert.InDelta(t, -0.10, g.WorstVsSurvey, 1e-12)
	// At equal spend: a +9 (0.75 − 0.66), b −1 (0.40 − 0.41): +4 on average.
	assert.InDelta(t, 0.04, g.MeanVsStrongestAtSpend, 1e-12)
	assert.Len(t, g.Missed, 5, "seeds, suite mean, worst task, below empty, survey: %v", g.Missed)
	assert.Len(t, g.Met, 2, "ahead on half the tasks, 3 points at equal spend: %v", g.Met)

	rep := Report(s, true)
	for _, want := range []string{"== a (2 seeds", "== suite: 2 tasks × 2 seeds", "strongest baseline per task", "missed: at least 5 seeds (2)", "SPEND USD"} {
		assert.Contains(t, rep, want)
	}
}
