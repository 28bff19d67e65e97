// Package survey measures a task's headroom before anyone pays for a
// search: how much a prompt of the task's length can help with this model.
// It draws uniformly random prompts from the task's actions, judges each
// on every train and dev line, and reports the spread of their accuracies
// and the test accuracy of the best of them. It draws its prompts as the
// best-of-N baseline does with the same seed, so a later search of the
// task finds those judgements in the proxy's cache.
package survey

import (
	"context"
	"fmt"
	"math"
	"slices"

	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
)

// Options configure a survey.
type Options struct {
	// Prompts is how many random prompts to judge.
	Prompts int
	// Seed seeds the draws (search.Drawer on search.StreamBestOfN).
	Seed int64
	// Progress, when set, is called after each prompt.
	Progress func(done, total int)
}

// Judgements is what a survey of t with n prompts asks for at most: each
// prompt on every train and dev line, the best one and the empty prompt
// on the test lines, and the empty prompt on train and dev.
func Judgements(t *task.Task, n int) int {
	return n*(len(t.Train)+len(t.Dev)) + len(t.Train) + len(t.Dev) + 2*len(t.Test)
}

// Prompt is one surveyed prompt.
type Prompt struct {
	Prompt string `json:"prompt"`
	// Accuracy and MeanRaw are on the train and dev lines.
	Accuracy float64 `json:"accuracy"`
	MeanRaw  float64 `json:"mean_raw_reward"`
}

// Report is a survey's findings. Accuracies are shares in [0, 1]; test
// figures are -1 for a task without a test set.
type Report struct {
	Task    string `json:"task"`
	Seed    int64  `json:"seed"`
	Lines   int    `json:"train_dev_lines"`
	Actions int    `json:"actions"`
	// Empty is the empty prompt's train+dev accuracy, EmptyTest its test
	// accuracy.
	Empty     float64 `json:"empty_accuracy"`
	EmptyTest float64 `json:"empty_test_accuracy"`
	// Mean, SD and the quantiles describe the random prompts' train+dev
	// accuracies.
	Mean      float64            `json:"mean"`
	SD        float64            `json:"sd"`
	Quantiles map[string]float64 `json:"quantiles"` // "min", "q10", "q25", "median", "q75", "q90", "max"
	// Best is the prompt with the best train+dev accuracy (mean raw reward
	// breaking ties, then the earlier drawn), BestTest its test accuracy.
	Best     Prompt   `json:"best"`
	BestTest float64  `json:"best_test_accuracy"`
	Prompts  []Prompt `json:"prompts"`
	// Tally is what the survey's judgements took.
	Tally judge.Tally `json:"tally"`
}

// Run surveys t, drawing from vocab's actions and judging with p.
func Run(ctx context.Context, t *task.Task, vocab search.Vocabulary, p *judge.Panel, o Options) (Report, error) {
	if o.Prompts < 1 {
		return Report{}, fmt.Errorf("survey: want at least one prompt, got %d", o.Prompts)
	}
	lines := append(slices.Clone(t.Train), t.Dev...)
	rep := Report{Task: t.Name, Seed: o.Seed, Lines: len(lines), Actions: len(vocab.Actions()), EmptyTest: -1, BestTest: -1}
	ev, err := p.Complete(ctx, []string{""}, lines)
	if err != nil {
		return rep, fmt.Errorf("survey: the empty prompt: %w", err)
	}
	rep.Empty = judge.Accuracy(ev[0])
	draw := search.Drawer(t, vocab, o.Seed, search.StreamBestOfN)
	accs := make([]float64, 0, o.Prompts)
	for i := range o.Prompts {
		prompt := draw()
		vs, err := p.Complete(ctx, []string{prompt}, lines)
		if err != nil {
			return rep, fmt.Errorf("survey: prompt %d: %w", i+1, err)
		}
		pr := Prompt{Prompt: prompt, Accuracy: judge.Accuracy(vs[0]), MeanRaw: judge.MeanRaw(vs[0])}
		rep.Prompts = append(rep.Prompts, pr)
		if i == 0 || pr.Accuracy > rep.Best.Accuracy || pr.Accuracy == rep.Best.Accuracy && pr.MeanRaw > rep.Best.MeanRaw {
			rep.Best = pr
		}
		accs = append(accs, pr.Accuracy)
		if o.Progress != nil {
			o.Progress(i+1, o.Prompts)
		}
	}
	rep.Mean, rep.SD = MeanSD(accs)
	rep.Quantiles = quantiles(accs)
	if len(t.Test) > 0 {
		for _, x := range []struct {
			prompt string
			acc    *float64
		}{{"", &rep.EmptyTest}, {rep.Best.Prompt, &rep.BestTest}} {
			vs, err := p.Complete(ctx, []string{x.prompt}, t.Test)
			if err != nil {
				return rep, fmt.Errorf("survey: test lines: %w", err)
			}
			*x.acc = judge.Accuracy(vs[0])
		}
	}
	rep.Tally = p.Tally()
	return rep, nil
}

// MeanSD is the mean of xs and their population standard deviation (0, 0
// for none).
func MeanSD(xs []float64) (mean, sd float64) {
	if len(xs) == 0 {
		return 0, 0
	}
	var s float64
	for _, x := range xs {
		s += x
	}
	m := s / float64(len(xs))
	var ss float64
	for _, x := range xs {
		ss += (x - m) * (x - m)
	}
	return m, math.Sqrt(ss / float64(len(xs)))
}

// quantiles are the nearest-rank quantiles of xs (the smallest value with
// at least that share of xs at or below it).
func quantiles(xs []float64) map[string]float64 {
	s := slices.Clone(xs)
	slices.Sort(s)
	at := func(q float64) float64 {
		i := int(math.Ceil(q*float64(len(s)))) - 1
		return s[max(0, min(i, len(s)-1))]
	}
	return map[string]float64{"min": s[0], "q10": at(0.1), "q25": at(0.25), "median": at(0.5), "q75": at(0.75), "q90": at(0.9), "max": s[len(s)-1]}
}
