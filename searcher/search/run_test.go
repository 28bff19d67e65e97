package search_test

import (
	"context"
	"io"
	"net/http/httptest"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task/tasktest"
)

// rig is the real model, loaded once per test, and a model server on the
// completions wire format standing where the proxy would (the scorer needs
// only the wire format).
type rig struct {
	model *localmodel.Model
	api   string
}

func newRig(t *testing.T) rig {
	t.Helper()
	m, err := localmodel.Load(modeltest.Path(t))
	require.NoError(t, err)
	srv := httptest.NewServer(localmodel.NewHandler(m, localmodel.HandlerOptions{}))
	t.Cleanup(srv.Close)
	return rig{model: m, api: srv.URL + "/v1"}
}

// TestEveryContenderGetsTheSearchsBudget: with examples_per_step above
// the train set's size each prompt is judged on the whole set; the search
// then keeps a quarter of its budget for its choice, and every baseline is
// given the whole budget, which the forecast counts too. Hand-worked: 2
// steps × 2 prompts × 40 training sentences (reading-corner-train.jsonl)
// = 160, the greedy prompt on the 20 dev sentences at both steps 40, the
// choice round(200 / 3) = 67: 267. Best-of-N judges 267 / 60 = 4 prompts
// on the 60 train and dev lines (240), the one-batch baseline 6 prompts
// on 40 lines (240); halving asks for at most the budget.
func TestEveryContenderGetsTheSearchsBudget(t *testing.T) {
	r := newRig(t)
	path := tasktest.WriteExample(t, "steps: 90", "steps: 2", "prompts_per_step: 16", "prompts_per_step: 2", "examples_per_step: 8", "examples_per_step: 60",
		"run: [best-of-n, halving]", "run: [best-of-n, halving, random]")
	oc, err := search.RunJob(context.Background(), r.model, search.Job{TaskPath: path, Proxy: r.api, Out: t.TempDir()}, io.Discard, nil)
	require.NoError(t, err)
	const budget = 267
	assert.Equal(t, budget, oc.Results.Budget)
	got := map[string]int{}
	for _, c := range oc.Results.Ranking {
		got[c.Method] = c.Calls
	}
	assert.LessOrEqual(t, got["rl"], budget, "the search stays within its budget")
	assert.Greater(t, got["rl"], 160, "the search's choice judges candidates")
	assert.Equal(t, got["rl"], got["rl-greedy"], "rl and rl-greedy are one search")
	assert.Equal(t, 240, got["best-of-n"])
	assert.Equal(t, 240, got["random"])
	assert.LessOrEqual(t, got["halving"], budget)
	assert.Zero(t, got["empty"])
	assert.Equal(t, search.Plan{Search: budget, Baselines: 3 * budget, Evaluation: 8 * 100, TokensPerJudgement: oc.Plan.TokensPerJudgement}, oc.Plan)
}
