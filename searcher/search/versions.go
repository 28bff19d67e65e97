package search

import (
	"cmp"
	"runtime/debug"

	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/task"
)

// resultsFormat is the layout version of results.json.
const resultsFormat = 2

func settingsOf(t *task.Task, actions int) Settings {
	labels := make(map[string]string, len(t.Labels))
	for _, l := range t.Labels {
		labels[l.Name] = l.Verbalizer
	}
	return Settings{
		Model: t.Model, Endpoint: string(t.Endpoint), Template: t.Template, Labels: labels,
		PromptLength: t.PromptLength, PromptsPerStep: t.PromptsPerStep, ExamplesPerStep: t.ExamplesPerStep,
		TopLogprobs: t.TopLogprobs, Actions: actions, RewardFactor: cmp.Or(t.Reward.Factor, 1),
		LearningRate: t.Policy.LearningRate, TopK: min(cmp.Or(t.Policy.TopK, policy.DefaultTopK), actions),
		TargetRate: cmp.Or(t.Policy.TargetRate, policy.DefaultPolyak),
	}
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
