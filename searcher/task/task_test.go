package task

import (
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/reward"
)

func TestExampleFileParses(t *testing.T) {
	task, err := Parse([]byte(ExampleFile), searchTestdata, localTokenizer(t))
	require.NoError(t, err)
	// Sizes of testdata/search/reading-corner-{train,dev,test}.jsonl.
	assert.Falsef(t, len(task.Train) != 40 || len(task.Dev) != 20 || len(task.Test) != 40, "sizes = %d/%d/%d, want 40/20/40", len(task.Train), len(task.Dev), len(task.Test))
	want := []Label{{"lily", " Lily"}, {"tim", " Tim"}}
	assert.Falsef(t, len(task.Labels) != 2 || task.Labels[0] != want[0] || task.Labels[1] != want[1], "labels = %q, want %q (file order)", task.Labels, want)
	assert.Falsef(t, task.Endpoint != Completions || task.Model != "stories260K" || task.Seed != 7 || task.SpendCapUSD != 5, "endpoint, model, seed, cap = %q, %q, %d, %v", task.Endpoint, task.Model, task.Seed, task.SpendCapUSD)
	assert.Equal(t, reward.Config{Kind: reward.KindMargin, Margin: 0.5}, task.Reward, "reward")
	assert.True(t, task.AutoFactor, "auto factor")
	assert.Equal(t, ChooseSettings{Share: 0.25, Candidates: 64}, task.Choose, "choose")
	assert.Equal(t, BaselineSettings{Run: []string{BestOfN, Halving}, HalvingFirst: 4}, task.Baselines, "baselines")
	assert.Falsef(t, !task.AllowList.WordInitial || task.AllowList.MinChars != 2 || len(task.ManualPrompts) != 2, "allow list %+v, manual prompts %q", task.AllowList, task.ManualPrompts)
	assert.Falsef(t, task.Prices == nil || *task.Prices != (Prices{InputPerMillion: 0.5, OutputPerMillion: 1.5}), "prices = %+v, want the example's 0.50 / 1.50 USD per million", task.Prices)
	assert.Equal(t, PolicySettings{LearningRate: 0.003, TopK: 256, TargetRate: 0.001}, task.Policy, "policy")
	assert.Equal(t, "She hugged her doll. Story: The name was", task.Fill("She hugged her doll.", "Story:"), "Fill")
	verbs := task.Verbalizers()
	assert.Falsef(t, len(verbs) != 2 || verbs[1] != " Tim", "Verbalizers = %q", verbs)
	assert.False(t, task.LabelIndex("tim") != 1 || task.LabelIndex("tom") != -1, "LabelIndex: wrong index")
}

// minimal is the smallest valid task file over the files of minimalData.
const minimal = `name: t
model: stories260K
labels:
  harvest: " happy"
  repair: " big"
template: "{input} {prompt} It was"
data:
  train: train.jsonl
  dev: dev.jsonl
`

var minimalData = map[string]string{
	"train.jsonl": `{"text":"We picked apples.","label":"harvest"}` + "\n\n" + `{"text":"The gate broke.","label":"repair"}` + "\n",
	"dev.jsonl":   `{"text":"Pears are ripe.","label":"harvest"}` + "\n",
	"notes.csv":   "id,note,kind\n1,\"We picked plums, lots.\",harvest\n2,The roof leaks.,repair\n",
	"empty.jsonl": "",
	"weeds.jsonl": `{"text":"Pull the weeds.","label":"weeding"}` + "\n",
}

func TestDefaults(t *testing.T) {
	task, err := Parse([]byte(minimal), writeFiles(t, minimalData), nil)
	require.NoError(t, err)
	got := []int{task.PromptLength, task.Steps, task.PromptsPerStep, task.ExamplesPerStep, task.Concurrency, task.TopLogprobs}
	want := []int{DefaultPromptLength, DefaultSteps, DefaultPromptsPerStep, DefaultExamplesPerStep, DefaultConcurrency, DefaultTopLogprobs}
	for i := range got {
		assert.Equal(t, want[i], got[i], "default %d = %d, want %d", i, got[i], want[i])
	}
	assert.Falsef(t, task.Prices != nil, "prices = %+v, want nil when the file has none", task.Prices)
	assert.Falsef(t, task.Endpoint != Completions || task.Test != nil || len(task.Train) != 2, "endpoint %q, test %v, train %d", task.Endpoint, task.Test, len(task.Train))
	// No policy section: the task's learning rate, the policy's own top-k
	// and target rate (zero); no reward scale: the automatic factor.
	assert.Falsef(t, task.Policy != (PolicySettings{LearningRate: DefaultLearningRate}) || !task.AutoFactor || task.AllowList.MinChars != 0, "policy %+v, auto factor %v, min chars %d", task.Policy, task.AutoFactor, task.AllowList.MinChars)
}

func TestCSVData(t *testing.T) {
	src := strings.Replace(minimal, "  train: train.jsonl\n", "  train: notes.csv\n  text_field: note\n  label_field: kind\n", 1)
	src = strings.Replace(src, "  dev: dev.jsonl\n", "  dev: notes.csv\n", 1)
	task, err := Parse([]byte(src), writeFiles(t, minimalData), nil)
	require.NoError(t, err)
	want := (Example{"We picked plums, lots.", "harvest"})
	assert.Falsef(t, len(task.Train) != 2 || task.Train[0] != want, "train = %q, want first %q", task.Train, want)
}

func TestParseErrors(t *testing.T) {
	tok := localTokenizer(t)
	dir := writeFiles(t, minimalData)
	// Source: the task-file schema is this project's own (ExampleFile);
	// fields and lines are hand-counted on minimal (9 lines, so appended
	// keys are on line 10), and the bad files a user is most likely to write (missing labels,
	// a verbalizer that is not one token, an empty dataset, a template
	// without {prompt}) are among them.
	tests := []struct {
		name      string
		edit      func(string) string
		tokenizer bool
		want      error
		field     string
		line      int
	}{
		{"unknown key", func(s string) string { return s + "temprature: 0\n" }, false, ErrUnknownField, "temprature", 10},
		{"unknown nested key", func(s string) string {
			return strings.Replace(s, "  dev: dev.jsonl\n", "  dev: dev.jsonl\n  tset: x.jsonl\n", 1)
		}, false, ErrUnknownField, "data.tset", 10},
		{"wrong type", func(s string) string { return s + "steps: many\n" }, false, ErrInvalid, "steps", 10},
		{"syntax", func(s string) string { return s + "model: [\n" }, false, ErrInvalid, "(file)", 10},
		{"no name", func(s string) string { return strings.Replace(s, "name: t\n", "", 1) }, false, ErrMissing, "name", 0},
		{"no labels", func(s string) string {
			return strings.Replace(s, "labels:\n  harvest: \" happy\"\n  repair: \" big\"\n", "", 1)
		}, false, ErrMissing, "labels", 0},
		{"one label", func(s string) string { return strings.Replace(s, "  repair: \" big\"\n", "", 1) }, false, ErrMissing, "labels", 3},
		{"empty verbalizer", func(s string) string { return strings.Replace(s, `" big"`, `""`, 1) }, false, ErrMissing, "labels.repair", 5},
		{"duplicate verbalizer", func(s string) string { return strings.Replace(s, `" big"`, `" happy"`, 1) }, false, ErrVerbalizer, "labels.repair", 5},
		// " harvest" is not a piece of the stories260K vocabulary (512 tokens).
		{"multi-token verbalizer", func(s string) string { return strings.Replace(s, `" big"`, `" harvest"`, 1) }, true, ErrVerbalizer, "labels.repair", 5},
		// "big" without its space is not one token either: the vocabulary
		// has " big" but no "big".
		{"verbalizer without space", func(s string) string { return strings.Replace(s, `" big"`, `"big"`, 1) }, true, ErrVerbalizer, "labels.repair", 5},
		{"no prompt placeholder", func(s string) string { return strings.Replace(s, "{prompt} ", "", 1) }, false, ErrInvalid, "template", 6},
		{"no input placeholder", func(s string) string { return strings.Replace(s, "{input} ", "", 1) }, false, ErrInvalid, "template", 6},
		{"bad endpoint", func(s string) string { return s + "endpoint: embeddings\n" }, false, ErrInvalid, "endpoint", 10},
		{"no data", func(s string) string { return s[:strings.Index(s, "data:")] }, false, ErrMissing, "data", 0},
		{"no dev", func(s string) string { return strings.Replace(s, "  dev: dev.jsonl\n", "", 1) }, false, ErrMissing, "data.dev", 7},
		{"missing file", func(s string) string { return strings.Replace(s, "dev.jsonl", "nope.jsonl", 1) }, false, ErrDataset, "data.dev", 9},
		{"empty dataset", func(s string) string { return strings.Replace(s, "dev.jsonl", "empty.jsonl", 1) }, false, ErrDataset, "data.dev", 9},
		{"unknown label in data", func(s string) string { return strings.Replace(s, "dev.jsonl", "weeds.jsonl", 1) }, false, ErrDataset, "data.dev", 9},
		{"bad format", func(s string) string { return s + "  format: parquet\n" }, false, ErrInvalid, "data.format", 10},
		{"zero prompt length", func(s string) string { return s + "prompt_length: 0\n" }, false, ErrInvalid, "prompt_length", 10},
		{"one prompt per step with z-score", func(s string) string { return s + "prompts_per_step: 1\n" }, false, ErrInvalid, "prompts_per_step", 10},
		{"negative cap", func(s string) string { return s + "spend_cap_usd: -1\n" }, false, ErrInvalid, "spend_cap_usd", 10},
		{"empty manual prompt", func(s string) string { return s + "manual_prompts: [\"ok\", \"\"]\n" }, false, ErrInvalid, "manual_prompts[1]", 10},
		{"zero correct", func(s string) string { return s + "reward:\n  kind: gap\n  correct: 0\n" }, false, ErrInvalid, "reward.correct", 12},
		{"unknown reward kind", func(s string) string { return s + "reward:\n  kind: hinge\n" }, false, ErrInvalid, "reward.kind", 11},
		{"gap constant with the margin reward", func(s string) string { return s + "reward:\n  wrong: 180\n" }, false, ErrInvalid, "reward.wrong", 11},
		{"margin with the gap reward", func(s string) string { return s + "reward:\n  kind: gap\n  margin: 1\n" }, false, ErrInvalid, "reward.margin", 12},
		{"zero margin", func(s string) string { return s + "reward:\n  margin: 0\n" }, false, ErrInvalid, "reward.margin", 11},
		{"choice share of one", func(s string) string { return s + "choose:\n  share: 1\n" }, false, ErrInvalid, "choose.share", 11},
		{"no candidates", func(s string) string { return s + "choose:\n  candidates: 0\n" }, false, ErrInvalid, "choose.candidates", 11},
		{"unknown baseline", func(s string) string { return s + "baselines:\n  run: [best-of-n, grid]\n" }, false, ErrInvalid, "baselines.run[1]", 11},
		{"baseline twice", func(s string) string { return s + "baselines:\n  run: [halving, halving]\n" }, false, ErrInvalid, "baselines.run[1]", 11},
		{"zero halving depth", func(s string) string { return s + "baselines:\n  halving_first_lines: 0\n" }, false, ErrInvalid, "baselines.halving_first_lines", 11},
		{"positive floor", func(s string) string { return s + "reward:\n  missing_logprob: 1\n" }, false, ErrInvalid, "reward.missing_logprob", 11},
		{"negative clip", func(s string) string { return s + "reward:\n  scale: {clip: -1}\n" }, false, ErrInvalid, "reward.scale.clip", 11},
		{"negative min_chars", func(s string) string { return s + "allow_list:\n  min_chars: -1\n" }, false, ErrInvalid, "allow_list.min_chars", 11},
		{"learning rate too big", func(s string) string { return s + "policy:\n  learning_rate: 2\n" }, false, ErrInvalid, "policy.learning_rate", 11},
		{"zero top_k", func(s string) string { return s + "policy:\n  top_k: 0\n" }, false, ErrInvalid, "policy.top_k", 11},
		{"zero target rate", func(s string) string { return s + "policy:\n  target_rate: 0\n" }, false, ErrInvalid, "policy.target_rate", 11},
		{"prices without output", func(s string) string { return s + "prices:\n  input_per_million: 0.5\n" }, false, ErrMissing, "prices.output_per_million", 10},
		{"negative price", func(s string) string {
			return s + "prices:\n  input_per_million: -1\n  output_per_million: 1\n"
		}, false, ErrInvalid, "prices.input_per_million", 11},
		{"infinite price", func(s string) string {
			return s + "prices:\n  input_per_million: 1\n  output_per_million: .inf\n"
		}, false, ErrInvalid, "prices.output_per_million", 12},
		{"empty prices", func(s string) string { return s + "prices:\n" }, false, ErrMissing, "prices", 10},
		{"unknown prices key", func(s string) string { return s + "prices:\n  input: 1\n" }, false, ErrUnknownField, "prices.input", 11},
		{"unknown policy key", func(s string) string { return s + "policy:\n  temperature: 1\n" }, false, ErrUnknownField, "policy.temperature", 11},
		{"empty file", func(string) string { return "" }, false, ErrMissing, "(file)", 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var tk Tokenizer
			if tt.tokenizer {
				tk = tok
			}
			_, err := Parse([]byte(tt.edit(minimal)), dir, tk)
			require.ErrorIs(t, err, tt.want, "err = %v, want %v", err, tt.want)
			var fe *FieldError
			require.Truef(t, errors.As(err, &fe), "err = %v, want a *FieldError", err)
			assert.Falsef(t, fe.Field != tt.field || fe.Line != tt.line, "at %s line %d, want %s line %d (%v)", fe.Field, fe.Line, tt.field, tt.line, err)
			assert.Falsef(t, tt.line > 0 && !strings.Contains(err.Error(), "line "), "message %q does not name the line", err)
		})
	}
}

func TestSeveralErrorsJoined(t *testing.T) {
	src := strings.Replace(minimal, "name: t\n", "", 1) + "prompt_length: 0\n"
	_, err := Parse([]byte(src), writeFiles(t, minimalData), nil)
	for _, want := range []string{"name:", "prompt_length:"} {
		assert.Falsef(t, err == nil || !strings.Contains(err.Error(), want), "err = %v, want it to mention %q", err, want)
	}
}

func TestAutoRewardFactor(t *testing.T) {
	tests := []struct {
		kind            reward.Kind
		length, actions int
		want            float64
	}{
		{reward.KindGap, 5, 100, 5 * 5 * math.Log(100)}, // 115.13: 5·L·ln|A|
		{"", 1, 2, 5 * math.Ln2},                        // the zero kind is the gap reward
		{reward.KindMargin, 5, 100, MarginFactorScale * 5 * math.Log(100)},
		{reward.KindMargin, 0, 100, 1}, // no prompt: no scale to match
		{reward.KindGap, 5, 1, 1},      // one action: the policy has no entropy
	}
	for _, tt := range tests {
		assert.InDelta(t, tt.want, AutoRewardFactor(tt.kind, tt.length, tt.actions), 1e-12, "AutoRewardFactor(%q, %d, %d)", tt.kind, tt.length, tt.actions)
	}
}
