package search_test

import (
	"context"
	"io"
	"net/http/httptest"
	"testing"

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
	if err != nil {
		t.Fatal(err)
	}
	srv := httptest.NewServer(localmodel.NewHandler(m, localmodel.HandlerOptions{}))
	t.Cleanup(srv.Close)
	return rig{model: m, api: srv.URL + "/v1"}
}

// TestRandomSearchGetsTheSearchsJudgementsWithASmallTrainSet: with
// examples_per_step above the train set's size each prompt is judged on
// the whole set, and random search is given exactly the judgements the RL
// search made, which the forecast counts too. Hand-worked: 2 steps × 2
// prompts × 40 training sentences (reading-corner-train.jsonl) = 160.
func TestRandomSearchGetsTheSearchsJudgementsWithASmallTrainSet(t *testing.T) {
	r := newRig(t)
	path := tasktest.WriteExample(t, "steps: 200", "steps: 2", "prompts_per_step: 8", "prompts_per_step: 2", "examples_per_step: 16", "examples_per_step: 60")
	oc, err := search.RunJob(context.Background(), r.model, search.Job{TaskPath: path, Proxy: r.api, Out: t.TempDir()}, io.Discard, nil)
	if err != nil {
		t.Fatal(err)
	}
	const want = 2 * 2 * 40
	got := map[string]int{}
	for _, c := range oc.Results.Ranking {
		got[c.Method] = c.Calls
	}
	if got["rl"] != want || got["random"] != want {
		t.Errorf("judgements: rl %d, random %d; want both %d", got["rl"], got["random"], want)
	}
	if oc.Plan.Search != want || oc.Plan.Random != want {
		t.Errorf("forecast: search %d, random %d; want both %d", oc.Plan.Search, oc.Plan.Random, want)
	}
}
