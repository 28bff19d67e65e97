package scorer

import (
	"net/http/httptest"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/task"
)

// localServer serves the real stories260K model on the completions wire
// format and returns its base URL (with /v1).
func localServer(tb testing.TB) string {
	tb.Helper()
	m, err := localmodel.Load(modeltest.Path(tb))
	require.NoError(tb, err)
	ts := httptest.NewServer(localmodel.NewHandler(m, localmodel.HandlerOptions{}))
	tb.Cleanup(ts.Close)
	return ts.URL + "/v1"
}

// exampleTexts fills the example task's template with the first n dev
// examples under each prompt.
func exampleTexts(tb testing.TB, n int, prompts ...string) (*task.Task, []string) {
	tb.Helper()
	tk, err := task.Parse([]byte(task.ExampleFile), "../../testdata/search", nil)
	require.NoError(tb, err)
	var texts []string
	for _, p := range prompts {
		for _, ex := range tk.Dev[:n] {
			texts = append(texts, tk.Fill(ex.Text, p))
		}
	}
	return tk, texts
}

func newClient(tb testing.TB, o Options) *Client {
	tb.Helper()
	c, err := New(o)
	require.NoError(tb, err)
	return c
}
