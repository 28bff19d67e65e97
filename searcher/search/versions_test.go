package search

import (
	"context"
	"io"
	"testing"

	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/task"
)

// plainPolicy is a Policy that does not report its settings.
type plainPolicy struct{}

func (plainPolicy) Sample(context.Context, int) ([][]int, error) { return nil, nil }
func (plainPolicy) Update(context.Context, [][]int, []float64) (PolicyStats, error) {
	return PolicyStats{}, nil
}
func (plainPolicy) Greedy(context.Context) ([]int, error) { return nil, nil }
func (plainPolicy) Save(io.Writer) error                  { return nil }

// reportingPolicy reports the settings it runs with, as *policy.Trainer does.
type reportingPolicy struct {
	plainPolicy
	cfg policy.Config
}

func (p reportingPolicy) Config() policy.Config { return p.cfg }

// TestSettingsRecordTheLearnerInForce: results.json shows the policy's own
// settings when it reports them, else the task's.
func TestSettingsRecordTheLearnerInForce(t *testing.T) {
	tk := &task.Task{Policy: task.PolicySettings{LearningRate: 0.003}}
	tests := []struct {
		name     string
		pol      Policy
		lr, rate float64
		topK     int
	}{
		{"reported", reportingPolicy{cfg: policy.Config{LearningRate: 0.003, TopK: 90, Polyak: 0.001}}, 0.003, 0.001, 90},
		{"not reported", plainPolicy{}, 0.003, 0, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			s := settingsOf(tk, 90, tt.pol)
			if s.LearningRate != tt.lr || s.TopK != tt.topK || s.TargetRate != tt.rate || s.Actions != 90 {
				t.Errorf("settings %+v, want learning rate %v, top-k %d, target rate %v", s, tt.lr, tt.topK, tt.rate)
			}
		})
	}
	var _ configured = (*policy.Trainer)(nil) // the real learner reports its settings
}
