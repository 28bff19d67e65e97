// Package scorertest serves the real local model on the completions wire
// format for the searcher's tests, standing where the proxy would (a
// scorer needs only the wire format), and parses the example task.
package scorertest

import (
	"net/http/httptest"
	"testing"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
	"github.com/stintlab/stint/searcher/task/tasktest"
)

// Rig is the real model and a server of it.
type Rig struct {
	Model *localmodel.Model
	// API is the server's base URL, version path included.
	API string
}

// Start loads the model and serves it until the test ends.
func Start(tb testing.TB) Rig {
	tb.Helper()
	m, err := localmodel.Load(modeltest.Path(tb))
	if err != nil {
		tb.Fatal(err)
	}
	srv := httptest.NewServer(localmodel.NewHandler(m, localmodel.HandlerOptions{}))
	tb.Cleanup(srv.Close)
	return Rig{Model: m, API: srv.URL + "/v1"}
}

// Task parses the example task with edits (tasktest.WriteExample) against
// the model's tokenizer.
func (r Rig) Task(tb testing.TB, edits ...string) *task.Task {
	tb.Helper()
	path := tasktest.WriteExample(tb, edits...)
	t, err := task.Load(path, task.NewLocalTokenizer(r.Model.Tokenizer()))
	if err != nil {
		tb.Fatal(err)
	}
	return t
}

// Scorer is a scoring client of the rig's server for t.
func (r Rig) Scorer(tb testing.TB, t *task.Task) *scorer.Client {
	tb.Helper()
	c, err := scorer.New(scorer.Options{BaseURL: r.API, Model: t.Model, TopLogprobs: t.TopLogprobs, Concurrency: 2})
	if err != nil {
		tb.Fatal(err)
	}
	return c
}
