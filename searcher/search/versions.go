package search

import (
	"cmp"
	"runtime/debug"

	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/task"
)

// resultsFormat is the layout version of results.json.
const resultsFormat = 3

// configured is a policy that reports its settings with defaults filled
// in; *policy.Trainer is one.
type configured interface {
	Config() policy.Config
}

// settingsOf records what a search ran with. The learner's figures are the
// policy's own when it reports them, so results.json shows the values in
// force (defaults and the top-k cap at the action count included), not a
// second reckoning of them; otherwise they are the task's.
func settingsOf(t *task.Task, actions int, pol Policy) Settings {
	labels := make(map[string]string, len(t.Labels))
	for _, l := range t.Labels {
		labels[l.Name] = l.Verbalizer
	}
	s := Settings{
		Model: t.Model, Endpoint: string(t.Endpoint), Template: t.Template, Labels: labels,
		PromptLength: t.PromptLength, PromptsPerStep: t.PromptsPerStep, ExamplesPerStep: t.ExamplesPerStep,
		TopLogprobs: t.TopLogprobs, Actions: actions, RewardFactor: cmp.Or(t.Reward.Factor, 1),
		LearningRate: t.Policy.LearningRate, TopK: t.Policy.TopK, TargetRate: t.Policy.TargetRate,
	}
	if c, ok := pol.(configured); ok {
		cfg := c.Config()
		s.LearningRate, s.TopK, s.TargetRate = cfg.LearningRate, cfg.TopK, cfg.Polyak
	}
	return s
}

// versions reads the binary's build information: its module version, or
// its VCS revision for a development build.
func versions() Versions {
	v := Versions{Format: resultsFormat, Stint: "unknown"}
	info, ok := debug.ReadBuildInfo()
	if !ok {
		return v
	}
	v.Stint = info.Main.Version
	for _, s := range info.Settings {
		if s.Key == "vcs.revision" && (v.Stint == "" || v.Stint == "(devel)") {
			v.Stint = s.Value
		}
	}
	return v
}
