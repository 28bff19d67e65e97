package policy_test

import (
	"context"
	"errors"
	"math"
	"reflect"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/policy"
)

// TestConfigDefaults checks the defaults documented on Config.
func TestConfigDefaults(t *testing.T) {
	tests := []struct {
		name  string
		vocab int
		cfg   policy.Config
		want  policy.Config
	}{
		{"zero config, vocabulary 300", 300, policy.Config{},
			policy.Config{PromptLength: 5, Hidden: 256, TopK: 256, LearningRate: 1e-3, Polyak: 0.001, ClipNorm: 5}},
		{"top-k capped at vocabulary", 16, policy.Config{Hidden: 8},
			policy.Config{PromptLength: 5, Hidden: 8, TopK: 16, LearningRate: 1e-3, Polyak: 0.001, ClipNorm: 5}},
		{"top-k capped at allow-list, clipping off", 300, policy.Config{Hidden: 8, TopK: 10, ClipNorm: -1, Actions: []int{9, 4, 7}},
			policy.Config{PromptLength: 5, Hidden: 8, TopK: 3, LearningRate: 1e-3, Polyak: 0.001, ClipNorm: -1, Actions: []int{9, 4, 7}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := newTrainer(t, newPosBackbone(tc.vocab, 2, 1), tc.cfg).Config()
			if tc.want.Actions == nil {
				for i := range tc.vocab {
					tc.want.Actions = append(tc.want.Actions, i)
				}
			}
			assert.Truef(t, reflect.DeepEqual(got, tc.want), "got %+v\nwant %+v", got, tc.want)
		})
	}
}

func TestConfigErrors(t *testing.T) {
	tests := []struct {
		cfg   policy.Config
		field string
	}{
		{policy.Config{PromptLength: -1}, "PromptLength"},
		{policy.Config{Hidden: -3}, "Hidden"},
		{policy.Config{TopK: -1}, "TopK"},
		{policy.Config{LearningRate: -1e-3}, "LearningRate"},
		{policy.Config{LearningRate: math.NaN()}, "LearningRate"},
		{policy.Config{Polyak: 1.5}, "Polyak"},
		{policy.Config{ClipNorm: -2}, "ClipNorm"},
		{policy.Config{Actions: []int{}}, "Actions"},
		{policy.Config{Actions: []int{1, 16}}, "Actions[1]"},
		{policy.Config{Actions: []int{3, 3}}, "Actions[1]"},
	}
	for _, tc := range tests {
		_, err := policy.NewTrainer(newPosBackbone(16, 2, 1), tc.cfg)
		assert.Falsef(t, !errors.Is(err, policy.ErrConfig) || !strings.Contains(err.Error(), tc.field), "%+v: got %v, want ErrConfig naming %s", tc.cfg, err, tc.field)
	}
}

// badBackbone has a hidden state of the wrong width or a malformed head.
type badBackbone struct {
	rows, cols, values, hidden int
}

func (b badBackbone) Hidden(context.Context, []int) ([]float32, error) {
	return make([]float32, b.hidden), nil
}

func (b badBackbone) OutputHead() (int, int, []float32) {
	return b.rows, b.cols, make([]float32, b.values)
}

func TestBackboneErrors(t *testing.T) {
	ctx := context.Background()
	for _, b := range []badBackbone{{rows: 4, cols: 3, values: 11, hidden: 3}, {rows: 0, cols: 3, hidden: 3}} {
		_, err := policy.NewTrainer(b, policy.Config{Hidden: 4})
		assert.ErrorIs(t, err, policy.ErrBackbone, "%+v: NewTrainer got %v, want ErrBackbone", b, err)
	}
	tr := newTrainer(t, badBackbone{rows: 4, cols: 3, values: 12, hidden: 5}, policy.Config{Hidden: 4})
	_, err := tr.Sample(ctx, 1)
	assert.ErrorIs(t, err, policy.ErrBackbone, "Sample with 5-wide hidden state for a 3-column head: got %v, want ErrBackbone", err)
}

// TestInitialPolicy: the documented initialisation gives a policy within
// a few percent of uniform whose Q values are nevertheless not all equal.
func TestInitialPolicy(t *testing.T) {
	ctx := context.Background()
	tr := newTrainer(t, newPosBackbone(32, 3, 1), policy.Config{PromptLength: 3, Hidden: 64})
	for _, p := range [][]int{nil, {5}, {31, 0}} {
		q, err := tr.QValues(ctx, p)
		require.NoError(t, err)
		v := logSumExp(q)
		spread := 0.0
		for _, x := range q {
			spread = max(spread, math.Abs(math.Exp(x-v)*float64(len(q))-1))
		}
		assert.Falsef(t, spread > 0.05, "state %v: max |π·|A| − 1| = %.3g, want ≤ 0.05", p, spread)
		assert.Falsef(t, slices.Min(q) == slices.Max(q), "state %v: all Q values equal %v: top-k ties would follow action order", p, q[0])
	}
}

func logSumExp(x []float64) float64 {
	m := slices.Max(x)
	s := 0.0
	for _, v := range x {
		s += math.Exp(v - m)
	}
	return m + math.Log(s)
}

// trained returns a trainer that has taken a few updates on the match
// reward, so its Q values are far from flat.
func trained(t *testing.T, cfg policy.Config) *policy.Trainer {
	t.Helper()
	tr := newTrainer(t, newPosBackbone(16, 3, 2), cfg)
	train(t, tr, 20, 8, func(p []int) float64 {
		if p[0] == 7 {
			return 5
		}
		return 0
	})
	return tr
}

// TestTopK: every sampled token is among the TopK largest Q values of its
// state, and TopK 1 samples the greedy prompt.
func TestTopK(t *testing.T) {
	ctx := context.Background()
	for _, k := range []int{1, 3, 16} {
		tr := trained(t, policy.Config{PromptLength: 3, Hidden: 16, TopK: k, LearningRate: 0.05, Seed: 3})
		prompts, err := tr.Sample(ctx, 20)
		require.NoError(t, err)
		greedy, err := tr.Greedy(ctx)
		require.NoError(t, err)
		distinct := map[int]bool{}
		for _, p := range prompts {
			assert.Falsef(t, k == 1 && !slices.Equal(p, greedy), "k=1: sampled %v, greedy %v", p, greedy)
			for s, tok := range p {
				q, err := tr.QValues(ctx, p[:s])
				require.NoError(t, err)
				rank := 0
				for _, v := range q {
					if v > q[tok] {
						rank++
					}
				}
				assert.Falsef(t, rank >= k, "k=%d: token %d at step %d of %v has rank %d", k, tok, s, p, rank)
				if s == 2 {
					distinct[tok] = true
				}
			}
		}
		assert.Falsef(t, k > 1 && len(distinct) < 2, "k=%d: 20 samples used one last token only: no exploration", k)
	}
}

// TestDeterminism: equal seeds give equal runs, Greedy is repeatable and
// draws nothing from the sampler's generator.
func TestDeterminism(t *testing.T) {
	ctx := context.Background()
	cfg := policy.Config{PromptLength: 3, Hidden: 16, LearningRate: 0.05, Seed: 11}
	a, b := trained(t, cfg), trained(t, cfg)
	g1, err := a.Greedy(ctx)
	require.NoError(t, err)
	g2, _ := a.Greedy(ctx)
	gb, _ := b.Greedy(ctx)
	assert.Falsef(t, !slices.Equal(g1, g2) || !slices.Equal(g1, gb), "greedy prompts differ: %v, %v, twin %v", g1, g2, gb)
	sa, _ := a.Sample(ctx, 10)
	sb, _ := b.Sample(ctx, 10)
	assert.Truef(t, reflect.DeepEqual(sa, sb), "equal seeds sampled differently (b skipped Greedy only once): %v vs %v", sa, sb)
	cfg.Seed = 12
	sc, _ := trained(t, cfg).Sample(ctx, 10)
	assert.Falsef(t, reflect.DeepEqual(sa, sc), "seeds 11 and 12 sampled the same prompts %v", sa)
}

// TestAllowList: only allowed ids are sampled or accepted, and Q has one
// value per allowed id.
func TestAllowList(t *testing.T) {
	ctx := context.Background()
	allowed := []int{12, 3, 9, 0}
	tr := newTrainer(t, newPosBackbone(16, 3, 1), policy.Config{PromptLength: 3, Hidden: 8, Actions: allowed})
	prompts, err := tr.Sample(ctx, 50)
	require.NoError(t, err)
	seen := map[int]bool{}
	for _, p := range prompts {
		for _, tok := range p {
			require.Truef(t, slices.Contains(allowed, tok), "sampled %d, not in %v", tok, allowed)
			seen[tok] = true
		}
	}
	assert.Len(t, seen, len(allowed), "150 near-uniform draws used %d of %d allowed ids", len(seen), len(allowed))
	q, _ := tr.QValues(ctx, nil)
	assert.Len(t, q, len(allowed), "got %d Q values, want %d", len(q), len(allowed))
	_, err = tr.Update(ctx, [][]int{{12, 4, 0}}, []float64{1})
	assert.ErrorIs(t, err, policy.ErrBatch, "Update with disallowed id 4")
}

// TestUpdateErrors: bad batches are refused and leave the trainer as it
// was.
func TestUpdateErrors(t *testing.T) {
	ctx := context.Background()
	tr := newTrainer(t, newPosBackbone(8, 2, 1), policy.Config{PromptLength: 2, Hidden: 8})
	before, _ := tr.QValues(ctx, nil)
	canceled, cancel := context.WithCancel(ctx)
	cancel()
	tests := []struct {
		name    string
		ctx     context.Context
		prompts [][]int
		rewards []float64
		want    error
	}{
		{"empty", ctx, nil, nil, policy.ErrBatch},
		{"lengths differ", ctx, [][]int{{1, 2}}, []float64{1, 2}, policy.ErrBatch},
		{"short prompt", ctx, [][]int{{1}}, []float64{1}, policy.ErrBatch},
		{"NaN reward", ctx, [][]int{{1, 2}}, []float64{math.NaN()}, policy.ErrBatch},
		{"infinite reward", ctx, [][]int{{1, 2}}, []float64{math.Inf(1)}, policy.ErrBatch},
		{"token outside vocabulary", ctx, [][]int{{1, 8}}, []float64{1}, policy.ErrBatch},
		{"context canceled", canceled, [][]int{{1, 2}}, []float64{1}, context.Canceled},
	}
	for _, tc := range tests {
		_, err := tr.Update(tc.ctx, tc.prompts, tc.rewards)
		assert.ErrorIs(t, err, tc.want, "%s: got %v, want %v", tc.name, err, tc.want)
	}
	_, err := tr.Sample(canceled, 1)
	assert.ErrorIs(t, err, context.Canceled, "Sample with canceled context: got %v", err)
	after, _ := tr.QValues(ctx, nil)
	assert.Falsef(t, !slices.Equal(before, after) || tr.Step() != 0, "refused updates changed the trainer (step %d)", tr.Step())
}

// TestStats: the reported figures follow from the batch, and clipping is
// reported against the configured bound.
func TestStats(t *testing.T) {
	ctx := context.Background()
	prompts := [][]int{{1, 2}, {3, 4}, {5, 6}}
	rewards := []float64{1, 4, -2}
	for _, clip := range []float64{1e-9, -1} {
		tr := newTrainer(t, newPosBackbone(8, 2, 1), policy.Config{PromptLength: 2, Hidden: 8, ClipNorm: clip})
		st, err := tr.Update(ctx, prompts, rewards)
		require.NoError(t, err)
		assert.Falsef(t, st.Step != 1 || st.MeanReward != 1 || st.MaxReward != 4, "clip %g: step %d, mean %v, max %v; want 1, 1, 4", clip, st.Step, st.MeanReward, st.MaxReward)
		assert.Falsef(t, st.Loss != (st.SingleLoss+st.MultiLoss)/2 || !(st.Loss > 0), "clip %g: loss %v is not the mean of %v and %v", clip, st.Loss, st.SingleLoss, st.MultiLoss)
		// Near-uniform over 8 actions: entropy ≈ log 8.
		assert.Falsef(t, math.Abs(st.Entropy-math.Log(8)) > 1e-3, "clip %g: entropy %v, want ≈ log 8 = %v", clip, st.Entropy, math.Log(8))
		want := clip > 0
		assert.Falsef(t, st.Clipped != want || !(st.GradNorm > 0), "clip %g: clipped %v (grad norm %v), want %v", clip, st.Clipped, st.GradNorm, want)
	}
}
