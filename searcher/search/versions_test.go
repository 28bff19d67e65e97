package search

import (
	"bytes"
	"context"
	"io"
	"path/filepath"
	"runtime"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"

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
			assert.Falsef(t, s.LearningRate != tt.lr || s.TopK != tt.topK || s.TargetRate != tt.rate || s.Actions != 90, "settings %+v, want learning rate %v, top-k %d, target rate %v", s, tt.lr, tt.topK, tt.rate)
		})
	}
	var _ configured = (*policy.Trainer)(nil) // the real learner reports its settings
}

// TestVersionsNameTheBuildAndTheBackbone: results.json says which Go
// release built the binary and which model file the backbone was. The
// file's size and SHA-256 are those recorded for stories260K.gguf in the
// shared models folder's MODEL-SOURCE.md (and localmodel.ModelSHA256).
func TestVersionsNameTheBuildAndTheBackbone(t *testing.T) {
	b, err := IdentifyBackbone(modeltest.Path(t))
	require.NoError(t, err)
	want := Backbone{File: "stories260K.gguf", Bytes: 1185376, SHA256: localmodel.ModelSHA256}
	assert.Equal(t, want, b, "backbone %+v, want %+v", b, want)
	v := versions(b)
	assert.Falsef(t, v.Go != runtime.Version() || v.Backbone != want || v.Format != resultsFormat || v.Stint == "", "versions %+v, want Go %s and the backbone", v, runtime.Version())
	var out bytes.Buffer
	require.NoError(t, WriteResults(&out, Results{Versions: v}))
	for _, key := range []string{`"go": "` + runtime.Version() + `"`, `"sha256": "` + want.SHA256 + `"`, `"bytes": 1185376`, `"file": "stories260K.gguf"`} {
		assert.Contains(t, out.String(), key, "results.json lacks %s:\n%s", key, out.String())
	}
	_, err = IdentifyBackbone(filepath.Join(t.TempDir(), "absent.gguf"))
	assert.Error(t, err, "identified a missing file")
}
