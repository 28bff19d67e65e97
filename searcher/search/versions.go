package search

import (
	"cmp"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"github.com/stintlab/stint/internal/buildinfo"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/reward"
	"github.com/stintlab/stint/searcher/task"
)

// resultsFormat is the layout version of results.json.
const resultsFormat = 5

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
		TopLogprobs: t.TopLogprobs, Actions: actions, RewardKind: string(cmp.Or(t.Reward.Kind, reward.KindGap)), RewardFactor: cmp.Or(t.Reward.Factor, 1),
		LearningRate: t.Policy.LearningRate, TopK: t.Policy.TopK, TargetRate: t.Policy.TargetRate,
		ChoiceShare: t.Choose.Share, Candidates: t.Choose.Candidates, HalvingFirst: t.Baselines.HalvingFirst,
	}
	if c, ok := pol.(configured); ok {
		cfg := c.Config()
		s.LearningRate, s.TopK, s.TargetRate = cfg.LearningRate, cfg.TopK, cfg.Polyak
	}
	return s
}

// versions names the build (buildinfo.Facts.Label: the module version,
// else the VCS revision Go stamped or the linker was given, else
// "unknown") and the Go release, and records the backbone.
func versions(b Backbone) Versions {
	f := buildinfo.Current()
	return Versions{Format: resultsFormat, Stint: f.Label(), Go: f.Go, Backbone: b}
}

// Backbone identifies a model file: its name, size and SHA-256.
type Backbone struct {
	File   string `json:"file"` // the file's base name
	Bytes  int64  `json:"bytes"`
	SHA256 string `json:"sha256"` // hex
}

// IdentifyBackbone reads the model file at path once to name it. Do it
// once per process (or per loaded model), not per search step.
func IdentifyBackbone(path string) (Backbone, error) {
	f, err := os.Open(path)
	if err != nil {
		return Backbone{}, fmt.Errorf("search: identify the backbone: %w", err)
	}
	defer f.Close()
	h := sha256.New()
	n, err := io.Copy(h, f)
	if err != nil {
		return Backbone{}, fmt.Errorf("search: identify the backbone %s: %w", path, err)
	}
	return Backbone{File: filepath.Base(path), Bytes: n, SHA256: hex.EncodeToString(h.Sum(nil))}, nil
}
