package policy

import (
	"context"
	"hash/fnv"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// noiseBackbone gives every prompt a fixed pseudo-random hidden state (a
// function of the prompt's tokens) and has a random head.
type noiseBackbone struct {
	vocab, dim int
	head       []float32
}

func newNoiseBackbone(vocab, dim int) *noiseBackbone {
	rng := rand.New(rand.NewPCG(3, 4))
	b := &noiseBackbone{vocab: vocab, dim: dim, head: make([]float32, vocab*dim)}
	for i := range b.head {
		b.head[i] = float32(rng.NormFloat64())
	}
	return b
}

func (b *noiseBackbone) Hidden(_ context.Context, p []int) ([]float32, error) {
	h := fnv.New64a()
	h.Write([]byte(promptKey(p)))
	rng := rand.New(rand.NewPCG(h.Sum64(), 5))
	x := make([]float32, b.dim)
	for i := range x {
		x[i] = float32(rng.NormFloat64())
	}
	return x, nil
}

func (b *noiseBackbone) OutputHead() (int, int, []float32) { return b.vocab, b.dim, b.head }

// TestGradient compares the hand-written gradient of the batch loss with
// central finite differences of the loss itself, for every parameter.
// Bound: with step 1e-5 the central difference's truncation error is
// O(1e-10) and its rounding error O(1e-16/1e-5) = O(1e-11), so a relative
// error (‖g − g_fd‖ / (‖g‖ + ‖g_fd‖)) above 1e-7 means a wrong derivative.
func TestGradient(t *testing.T) {
	tests := []struct {
		name    string
		cfg     Config
		prompts [][]int
		rewards []float64
	}{
		{"allow-list, L=3", Config{PromptLength: 3, Hidden: 5, Actions: []int{5, 1, 3}},
			[][]int{{5, 1, 3}, {3, 3, 1}, {1, 5, 5}}, []float64{1.5, -0.3, 0.7}},
		{"whole vocabulary, L=1", Config{PromptLength: 1, Hidden: 4},
			[][]int{{0}, {6}}, []float64{2, -1}},
	}
	ctx := context.Background()
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tr, err := NewTrainer(newNoiseBackbone(7, 6), tc.cfg)
			require.NoError(t, err)
			rng := rand.New(rand.NewPCG(9, 9))
			for i := range tr.params {
				tr.params[i] = 0.5 * rng.NormFloat64()
				tr.target[i] = 0.5 * rng.NormFloat64()
			}
			acts, err := tr.checkBatch(tc.prompts, tc.rewards)
			require.NoError(t, err)
			norm := 1 / float64(2*len(tc.prompts)*tc.cfg.PromptLength)
			loss := func(p []float64) float64 {
				s, err := tr.lossGrad(ctx, p, tc.prompts, acts, tc.rewards, make([]float64, len(p)))
				require.NoError(t, err)
				return (s.single + s.multi) * norm
			}
			grad := make([]float64, len(tr.params))
			_, err = tr.lossGrad(ctx, tr.params, tc.prompts, acts, tc.rewards, grad)
			require.NoError(t, err)
			const h = 1e-5
			p := append([]float64(nil), tr.params...)
			var diff, size float64
			for i := range p {
				orig := p[i]
				p[i] = orig + h
				up := loss(p)
				p[i] = orig - h
				down := loss(p)
				p[i] = orig
				fd := (up - down) / (2 * h)
				diff += (grad[i] - fd) * (grad[i] - fd)
				size += grad[i]*grad[i] + fd*fd
			}
			rel := math.Sqrt(diff) / math.Sqrt(size)
			// Common practice: a gradient check against central finite
			// differences, the bound from the error estimate above.
			assert.Falsef(t, !(rel < 1e-7), "relative gradient error %.3g, want < 1e-7 (central differences)", rel)
			assert.False(t, size == 0, "gradient is zero: the check proves nothing")
			t.Logf("relative error %.2g over %d parameters", rel, len(p))
		})
	}
}
