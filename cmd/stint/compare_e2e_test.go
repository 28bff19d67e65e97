package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/compare"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/survey"
	"github.com/stintlab/stint/searcher/task"
	"github.com/stintlab/stint/searcher/task/tasktest"
)

// smallTask is the example task cut to a few steps, for the comparison
// commands' tests.
func smallTask(t *testing.T) string {
	return tasktest.WriteExample(t, "steps: 90", "steps: 3", "prompts_per_step: 16", "prompts_per_step: 4", "examples_per_step: 8", "examples_per_step: 4")
}

// TestCompareRunsResumesAndSums runs `stint search compare --local` on a
// small task at two seeds: every cell has the search, both baselines at
// equal judgements and at equal spend (never spending more than the search
// did on its own), the empty and manual prompts; the summary covers the
// task. Run again after one cell's file is removed, it redoes only that
// cell and leaves the other as it was.
func TestCompareRunsResumesAndSums(t *testing.T) {
	t.Setenv("STINT_MODEL", modeltest.Path(t))
	path, out := smallTask(t), t.TempDir()
	args := []string{"search", "compare", path, "--seeds", "1,2", "--local", "--headroom", "4", "--out", out}
	text, err := runCLI(t, args...)
	require.NoError(t, err, text)
	assert.Contains(t, text, "== reading-corner (2 seeds")
	assert.Contains(t, text, "== suite: 1 tasks × 2 seeds")

	var res compare.Result
	b, err := os.ReadFile(filepath.Join(out, "compare.json"))
	require.NoError(t, err)
	require.NoError(t, json.Unmarshal(b, &res))
	require.Len(t, res.Cells, 2)
	require.Len(t, res.Surveys, 1)
	assert.Len(t, res.Surveys[0].Prompts, 4)
	for _, c := range res.Cells {
		assert.True(t, c.Priced, "the --local proxy prices calls at the demo prices")
		rl, ok := c.Row(search.MethodRL)
		require.True(t, ok)
		assert.Positive(t, rl.Spend)
		for _, m := range []string{task.BestOfN, task.Halving, compare.BestOfNAtSpend, compare.HalvingAtSpend, search.MethodEmpty} {
			row, ok := c.Row(m)
			if assert.True(t, ok, "seed %d has no %s row", c.Seed, m) {
				assert.GreaterOrEqual(t, row.TestAcc, 0.0)
			}
		}
		for _, m := range []string{compare.BestOfNAtSpend, compare.HalvingAtSpend} {
			row, _ := c.Row(m)
			assert.LessOrEqual(t, row.Spend, rl.Spend*(1+1e-9), "seed %d: %s spent more than the search", c.Seed, m)
		}
	}
	require.Len(t, res.Summary.Tasks, 1)
	assert.Equal(t, 2, res.Summary.Seeds)

	first := filepath.Join(out, "reading-corner", "s1", "cell.json")
	kept, err := os.ReadFile(first)
	require.NoError(t, err)
	st, err := os.Stat(first)
	require.NoError(t, err)
	require.NoError(t, os.Remove(filepath.Join(out, "reading-corner", "s2", "cell.json")))
	text, err = runCLI(t, args...)
	require.NoError(t, err, text)
	assert.Contains(t, text, "reading-corner seed 2: rl", "the removed cell runs again")
	assert.NotContains(t, text, "reading-corner seed 1: rl", "the finished cell is read back")
	again, err := os.ReadFile(first)
	require.NoError(t, err)
	st2, err := os.Stat(first)
	require.NoError(t, err)
	assert.Equal(t, kept, again)
	assert.Equal(t, st.ModTime(), st2.ModTime())
	_, err = os.Stat(filepath.Join(out, "reading-corner", "s2", "cell.json"))
	assert.NoError(t, err)
}

// TestHeadroomReportsTheSpread runs `stint search headroom --local`: it
// forecasts, prints the spread and the best prompt, and writes
// headroom.json with every prompt.
func TestHeadroomReportsTheSpread(t *testing.T) {
	t.Setenv("STINT_MODEL", modeltest.Path(t))
	out := t.TempDir()
	text, err := runCLI(t, "search", "headroom", smallTask(t), "--local", "--prompts", "5", "--out", out)
	require.NoError(t, err, text)
	for _, want := range []string{"forecast: ", "5 random prompts (seed 7)", "accuracy on train+dev: mean", "empty prompt:", "best prompt "} {
		assert.Contains(t, text, want)
	}
	var rep survey.Report
	b, err := os.ReadFile(filepath.Join(out, "headroom.json"))
	require.NoError(t, err)
	require.NoError(t, json.Unmarshal(b, &rep))
	assert.Len(t, rep.Prompts, 5)
	assert.Equal(t, 60, rep.Lines)

	_, err = runCLI(t, "search", "headroom", smallTask(t), "--local", "--prompts", "0", "--out", out)
	assert.ErrorContains(t, err, "--prompts must be at least 1")
	_, err = runCLI(t, "search", "compare", smallTask(t), "--seeds", "1,x", "--local", "--out", out)
	assert.True(t, err != nil && strings.Contains(err.Error(), `"x" is not a whole number`), "bad seeds: %v", err)
}
