package task

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestTaskSuite: the task suite in testdata/search (testdata/README.md)
// has the demo task and at least five more, every one loads against the
// model's tokenizer, shares the example's search settings (one setting for
// every task), has 2–4 labels, balanced splits of at least 40/20/60 lines
// (the demo's 40/20/40, not quite balanced, excepted), and no line twice within or across its
// splits.
func TestTaskSuite(t *testing.T) {
	tok := localTokenizer(t)
	example, err := Parse([]byte(ExampleFile), searchTestdata, tok)
	require.NoError(t, err)
	files, err := filepath.Glob(filepath.Join(searchTestdata, "*.yaml"))
	require.NoError(t, err)
	require.GreaterOrEqual(t, len(files), 6, "the demo task and at least five more")

	demo, err := os.ReadFile(filepath.Join(searchTestdata, "reading-corner.yaml"))
	require.NoError(t, err)
	assert.Equal(t, ExampleFile, string(demo), "reading-corner.yaml is the example task file (stint search example)")

	names := map[string]bool{}
	for _, path := range files {
		t.Run(filepath.Base(path), func(t *testing.T) {
			tk, err := Load(path, tok)
			require.NoError(t, err)
			assert.False(t, names[tk.Name], "task name %q is taken", tk.Name)
			names[tk.Name] = true
			assert.Equal(t, strings.TrimSuffix(filepath.Base(path), ".yaml"), tk.Name, "file named after its task")

			same := func(what string, want, got any) { assert.Equal(t, want, got, "%s differs from the example's", what) }
			same("prompt length", example.PromptLength, tk.PromptLength)
			same("steps", example.Steps, tk.Steps)
			same("prompts per step", example.PromptsPerStep, tk.PromptsPerStep)
			same("examples per step", example.ExamplesPerStep, tk.ExamplesPerStep)
			same("seed", example.Seed, tk.Seed)
			same("top_logprobs", example.TopLogprobs, tk.TopLogprobs)
			same("reward", example.Reward, tk.Reward)
			same("policy", example.Policy, tk.Policy)
			same("choose", example.Choose, tk.Choose)
			same("baselines", example.Baselines, tk.Baselines)
			same("endpoint and model", example.Endpoint+Endpoint(example.Model), tk.Endpoint+Endpoint(tk.Model))
			allow := tk.AllowList
			allow.Exclude = example.AllowList.Exclude
			same("allow list (but for its exclusions)", example.AllowList, allow)

			assert.GreaterOrEqual(t, len(tk.Labels), 2)
			assert.LessOrEqual(t, len(tk.Labels), 4)
			// The demo task came first, at 40/20/40 and not quite balanced.
			demo := tk.Name == "reading-corner"
			least := [3]int{40, 20, 60}
			if demo {
				least[2] = 40
			}
			seen := map[string]string{}
			for i, set := range [][]Example{tk.Train, tk.Dev, tk.Test} {
				split := [...]string{"train", "dev", "test"}[i]
				assert.GreaterOrEqual(t, len(set), least[i], "%s lines", split)
				count := map[string]int{}
				for _, e := range set {
					count[e.Label]++
					where, ok := seen[e.Text]
					assert.Falsef(t, ok, "%q is in %s and %s", e.Text, where, split)
					seen[e.Text] = split
				}
				for _, l := range tk.Labels {
					if demo {
						continue
					}
					assert.Equal(t, len(set)/len(tk.Labels), count[l.Name], "%s: label %s of %d lines", split, l.Name, len(set))
				}
			}
		})
	}
}
