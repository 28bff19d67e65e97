package task

import (
	"fmt"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"

	"go.yaml.in/yaml/v3"

	"github.com/stintlab/stint/searcher/reward"
)

// builder validates a rawTask into a Task, collecting every problem.
type builder struct {
	ix   lineIndex
	dir  string
	tok  Tokenizer
	errs []error
}

// fail records a problem at field; err wraps one of the sentinels.
func (b *builder) fail(field string, sentinel error, format string, args ...any) {
	b.errs = append(b.errs, &FieldError{Field: field, Line: b.ix.line(field), Err: fmt.Errorf("%w: %s", sentinel, fmt.Sprintf(format, args...))})
}

func (b *builder) build(r *rawTask) *Task {
	t := &Task{
		Name:          r.Name,
		Template:      r.Template,
		Endpoint:      Endpoint(r.Endpoint),
		Model:         r.Model,
		Seed:          r.Seed,
		SpendCapUSD:   r.SpendCapUSD,
		ManualPrompts: r.ManualPrompts,
	}
	if strings.TrimSpace(t.Name) == "" {
		b.fail("name", ErrMissing, "a task needs a name")
	}
	if strings.TrimSpace(t.Model) == "" {
		b.fail("model", ErrMissing, "name the model that scores prompts")
	}
	switch t.Endpoint {
	case "":
		t.Endpoint = Completions
	case Completions, Chat:
	default:
		b.fail("endpoint", ErrInvalid, "%q is not %q or %q", r.Endpoint, Completions, Chat)
	}
	switch {
	case t.Template == "":
		b.fail("template", ErrMissing, "a template with %s and %s is required", InputPlaceholder, PromptPlaceholder)
	case !strings.Contains(t.Template, PromptPlaceholder):
		b.fail("template", ErrInvalid, "%q has no %s placeholder", t.Template, PromptPlaceholder)
	case !strings.Contains(t.Template, InputPlaceholder):
		b.fail("template", ErrInvalid, "%q has no %s placeholder", t.Template, InputPlaceholder)
	}
	t.PromptLength = b.count("prompt_length", r.PromptLength, DefaultPromptLength, 1)
	t.Steps = b.count("steps", r.Steps, DefaultSteps, 1)
	t.ExamplesPerStep = b.count("examples_per_step", r.ExamplesPerStep, DefaultExamplesPerStep, 1)
	t.Concurrency = b.count("concurrency", r.Concurrency, DefaultConcurrency, 1)
	t.TopLogprobs = b.count("top_logprobs", r.TopLogprobs, DefaultTopLogprobs, 1)
	if t.SpendCapUSD < 0 {
		b.fail("spend_cap_usd", ErrInvalid, "must be >= 0 (0 for no cap of the search's own), got %v", t.SpendCapUSD)
	}
	t.Prices = b.prices(r.Prices)
	for i, p := range t.ManualPrompts {
		if strings.TrimSpace(p) == "" {
			b.fail(fmt.Sprintf("manual_prompts[%d]", i), ErrInvalid, "a manual prompt must not be empty")
		}
	}
	t.Reward = b.reward(r.Reward)
	// The z-score across a step's prompts needs at least two of them.
	minPrompts := 2
	if t.Reward.NoZScore {
		minPrompts = 1
	}
	t.PromptsPerStep = b.count("prompts_per_step", r.PromptsPerStep, DefaultPromptsPerStep, minPrompts)
	if r.AllowList != nil {
		t.AllowList = AllowList{WordInitial: r.AllowList.WordInitial, LettersOnly: r.AllowList.LettersOnly, Exclude: r.AllowList.Exclude}
		t.AllowList.MinChars = b.count("allow_list.min_chars", r.AllowList.MinChars, 0, 0)
		for i, x := range t.AllowList.Exclude {
			if x == "" {
				b.fail(fmt.Sprintf("allow_list.exclude[%d]", i), ErrInvalid, "an excluded token must not be empty")
			}
		}
	}
	t.AutoFactor = r.Reward == nil || r.Reward.Scale == nil || r.Reward.Scale.Factor == nil
	t.Policy = b.policy(r.Policy)
	t.Choose = b.choose(r.Choose)
	t.Baselines = b.baselines(r.Baselines)
	t.Labels = b.labels(&r.Labels)
	b.data(t, r.Data)
	return t
}

// prices reads the prices section: absent is nil; present, it needs both
// prices, each a finite number >= 0.
func (b *builder) prices(r *rawPrices) *Prices {
	if r == nil {
		if _, present := b.ix.byPath["prices"]; present {
			b.fail("prices", ErrMissing, "give input_per_million and output_per_million (USD per million tokens), or leave prices out")
		}
		return nil
	}
	price := func(field string, v *float64) float64 {
		switch {
		case v == nil:
			b.fail(field, ErrMissing, "the USD price per million tokens is required with prices")
			return 0
		case !(*v >= 0) || math.IsInf(*v, 1):
			b.fail(field, ErrInvalid, "must be a finite USD amount >= 0, got %v", *v)
			return 0
		}
		return *v
	}
	return &Prices{
		InputPerMillion:  price("prices.input_per_million", r.InputPerMillion),
		OutputPerMillion: price("prices.output_per_million", r.OutputPerMillion),
	}
}

func (b *builder) policy(r *rawPolicy) PolicySettings {
	p := PolicySettings{LearningRate: DefaultLearningRate}
	if r == nil {
		return p
	}
	if r.LearningRate != nil {
		if p.LearningRate = *r.LearningRate; !(p.LearningRate > 0 && p.LearningRate < 1) {
			b.fail("policy.learning_rate", ErrInvalid, "must be in (0, 1), got %v", p.LearningRate)
		}
	}
	p.TopK = b.count("policy.top_k", r.TopK, 0, 1)
	if r.TargetRate != nil {
		if p.TargetRate = *r.TargetRate; !(p.TargetRate > 0 && p.TargetRate <= 1) {
			b.fail("policy.target_rate", ErrInvalid, "must be in (0, 1], got %v", p.TargetRate)
		}
	}
	return p
}

func (b *builder) choose(r *rawChoose) ChooseSettings {
	c := ChooseSettings{Share: DefaultChoiceShare, Candidates: DefaultCandidates}
	if r == nil {
		return c
	}
	if r.Share != nil {
		if c.Share = *r.Share; !(c.Share >= 0 && c.Share < 1) {
			b.fail("choose.share", ErrInvalid, "must be in [0, 1), got %v", c.Share)
		}
	}
	c.Candidates = b.count("choose.candidates", r.Candidates, DefaultCandidates, 1)
	return c
}

func (b *builder) baselines(r *rawBase) BaselineSettings {
	c := BaselineSettings{Run: slices.Clone(DefaultBaselines), HalvingFirst: DefaultHalvingFirst}
	if r == nil {
		return c
	}
	if r.Run != nil {
		c.Run = nil
		seen := map[string]bool{}
		for i, name := range r.Run {
			switch {
			case !slices.Contains(Baselines, name):
				b.fail(fmt.Sprintf("baselines.run[%d]", i), ErrInvalid, "%q is not one of %s", name, strings.Join(Baselines, ", "))
			case seen[name]:
				b.fail(fmt.Sprintf("baselines.run[%d]", i), ErrInvalid, "%q is listed twice", name)
			default:
				c.Run = append(c.Run, name)
			}
			seen[name] = true
		}
	}
	c.HalvingFirst = b.count("baselines.halving_first_lines", r.HalvingFirst, DefaultHalvingFirst, 1)
	return c
}

// count returns *v, or def when absent, refusing values below least.
func (b *builder) count(field string, v *int, def, least int) int {
	if v == nil {
		return def
	}
	if *v < least {
		b.fail(field, ErrInvalid, "must be >= %d, got %d", least, *v)
	}
	return *v
}

func (b *builder) reward(r *rawReward) reward.Config {
	c := reward.Config{Kind: DefaultRewardKind}
	if r == nil {
		return c
	}
	if r.Kind != nil {
		switch k := reward.Kind(*r.Kind); k {
		case reward.KindMargin, reward.KindGap:
			c.Kind = k
		default:
			b.fail("reward.kind", ErrInvalid, "%q is not %q or %q", *r.Kind, reward.KindMargin, reward.KindGap)
		}
	}
	positive := func(field string, v *float64) float64 {
		if v == nil {
			return 0
		}
		if !(*v > 0) {
			b.fail(field, ErrInvalid, "must be > 0, got %v", *v)
		}
		return *v
	}
	c.Margin = positive("reward.margin", r.Margin)
	c.Correct = positive("reward.correct", r.Correct)
	c.Wrong = positive("reward.wrong", r.Wrong)
	if c.Kind == reward.KindMargin {
		for field, v := range map[string]*float64{"reward.correct": r.Correct, "reward.wrong": r.Wrong} {
			if v != nil {
				b.fail(field, ErrInvalid, "is a constant of the %q reward; this task's reward.kind is %q", reward.KindGap, reward.KindMargin)
			}
		}
	} else if r.Margin != nil {
		b.fail("reward.margin", ErrInvalid, "is a constant of the %q reward; this task's reward.kind is %q", reward.KindMargin, c.Kind)
	}
	c.NoZScore = r.ZScore != nil && !*r.ZScore
	if r.Scale != nil {
		c.Factor = positive("reward.scale.factor", r.Scale.Factor)
		if r.Scale.Clip != nil {
			if !(*r.Scale.Clip >= 0) {
				b.fail("reward.scale.clip", ErrInvalid, "must be >= 0 (0 for no clip), got %v", *r.Scale.Clip)
			}
			c.Clip = *r.Scale.Clip
		}
	}
	if r.MissingLogprob != nil {
		if !(*r.MissingLogprob < 0) {
			b.fail("reward.missing_logprob", ErrInvalid, "must be a negative log-probability, got %v", *r.MissingLogprob)
		}
		c.Floor = *r.MissingLogprob
	}
	return c
}

func (b *builder) labels(n *yaml.Node) []Label {
	if n.Kind == 0 {
		b.fail("labels", ErrMissing, "list each label with its verbalizer, e.g. positive: \" great\"")
		return nil
	}
	if n.Kind != yaml.MappingNode {
		b.fail("labels", ErrInvalid, "must map each label to its verbalizer")
		return nil
	}
	var out []Label
	byVerb := map[string]string{}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, v := n.Content[i], n.Content[i+1]
		field := "labels." + k.Value
		if v.Kind != yaml.ScalarNode || v.Tag == "!!null" || v.Value == "" {
			b.fail(field, ErrMissing, "label %q needs a verbalizer string", k.Value)
			continue
		}
		if other, dup := byVerb[v.Value]; dup {
			b.fail(field, ErrVerbalizer, "verbalizer %q is also label %q's", v.Value, other)
			continue
		}
		byVerb[v.Value] = k.Value
		if b.tok != nil {
			if toks := b.tok.Tokens(v.Value); len(toks) != 1 || toks[0] != v.Value {
				b.fail(field, ErrVerbalizer, "verbalizer %q is %d tokens for the model (%q), want exactly one", v.Value, len(toks), toks)
				continue
			}
		}
		out = append(out, Label{Name: k.Value, Verbalizer: v.Value})
	}
	if len(n.Content)/2 < 2 {
		b.fail("labels", ErrMissing, "a classification needs at least two labels, got %d", len(n.Content)/2)
	}
	return out
}

func (b *builder) data(t *Task, d *rawData) {
	if d == nil {
		b.fail("data", ErrMissing, "name the train and dev files")
		return
	}
	switch Format(d.Format) {
	case "", JSONL, CSV:
	default:
		b.fail("data.format", ErrInvalid, "%q is not %q or %q", d.Format, JSONL, CSV)
		return
	}
	text, label := d.TextField, d.LabelField
	if text == "" {
		text = "text"
	}
	if label == "" {
		label = "label"
	}
	labels := map[string]bool{}
	for _, l := range t.Labels {
		labels[l.Name] = true
	}
	read := func(field, path string, required bool) []Example {
		if path == "" {
			if required {
				b.fail(field, ErrMissing, "a %s file is required", strings.TrimPrefix(field, "data."))
			}
			return nil
		}
		exs, err := b.readSet(path, d.Format, text, label)
		if err != nil {
			b.fail(field, ErrDataset, "%v", err)
			return nil
		}
		if len(exs) == 0 {
			b.fail(field, ErrDataset, "%s holds no examples", path)
			return nil
		}
		if len(t.Labels) > 0 {
			for i, ex := range exs {
				if !labels[ex.Label] {
					b.fail(field, ErrDataset, "%s: example %d has label %q, which labels does not list", path, i+1, ex.Label)
					return nil
				}
			}
		}
		return exs
	}
	t.Train = read("data.train", d.Train, true)
	t.Dev = read("data.dev", d.Dev, true)
	t.Test = read("data.test", d.Test, false)
}

// readSet reads one dataset file, its format given or taken from the
// extension.
func (b *builder) readSet(path, format, text, label string) ([]Example, error) {
	if !filepath.IsAbs(path) {
		path = filepath.Join(b.dir, path)
	}
	f := Format(format)
	if f == "" {
		switch strings.ToLower(filepath.Ext(path)) {
		case ".jsonl", ".ndjson", ".json":
			f = JSONL
		case ".csv":
			f = CSV
		default:
			return nil, fmt.Errorf("%s: set data.format (jsonl or csv); the extension does not say", path)
		}
	}
	file, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer file.Close()
	var exs []Example
	switch f {
	case JSONL:
		exs, err = ReadJSONL(file, text, label)
	case CSV:
		exs, err = ReadCSV(file, text, label)
	}
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return exs, nil
}
