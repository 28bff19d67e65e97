package search_test

import (
	"context"
	"io"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
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

// writeTask writes the example task with edits (old → new pairs) next to
// copies of its datasets.
func writeTask(t *testing.T, edits ...string) string {
	t.Helper()
	dir := t.TempDir()
	for _, name := range []string{"reading-corner-train.jsonl", "reading-corner-dev.jsonl", "reading-corner-test.jsonl"} {
		b, err := os.ReadFile(filepath.Join("..", "..", "testdata", "search", name))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dir, name), b, 0o600); err != nil {
			t.Fatal(err)
		}
	}
	text := task.ExampleFile
	for i := 0; i+1 < len(edits); i += 2 {
		if !strings.Contains(text, edits[i]) {
			t.Fatalf("the example task has no %q", edits[i])
		}
		text = strings.Replace(text, edits[i], edits[i+1], 1)
	}
	path := filepath.Join(dir, "task.yaml")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// TestRandomSearchGetsTheSearchsJudgementsWithASmallTrainSet: with
// examples_per_step above the train set's size each prompt is judged on
// the whole set, and random search is given exactly the judgements the RL
// search made, which the forecast counts too. Hand-worked: 2 steps × 2
// prompts × 40 training sentences (reading-corner-train.jsonl) = 160.
func TestRandomSearchGetsTheSearchsJudgementsWithASmallTrainSet(t *testing.T) {
	r := newRig(t)
	path := writeTask(t, "steps: 200", "steps: 2", "prompts_per_step: 8", "prompts_per_step: 2", "examples_per_step: 16", "examples_per_step: 60")
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
