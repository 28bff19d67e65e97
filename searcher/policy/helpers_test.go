package policy_test

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/policy"
)

// treeBackbone is the complete tree of prompts of up to depth tokens over
// the vocabulary 0 … arity−1. The hidden state is the one-hot code of the
// prefix's breadth-first index, and the head is [I 0], so Q(s, a) is output
// a of the MLP and the network can represent any Q table: the policy is
// exactly tabular.
type treeBackbone struct {
	arity, depth int
}

// states is the number of non-terminal states (prefixes shorter than depth).
func (b treeBackbone) states() int {
	n, level := 0, 1
	for range b.depth {
		n += level
		level *= b.arity
	}
	return n
}

func (b treeBackbone) dim() int { return max(b.states(), b.arity) }

// index is the breadth-first index of prefix p.
func (b treeBackbone) index(p []int) int {
	first, level := 0, 1
	for range len(p) {
		first += level
		level *= b.arity
	}
	off := 0
	for _, a := range p {
		off = off*b.arity + a
	}
	return first + off
}

func (b treeBackbone) Hidden(_ context.Context, p []int) ([]float32, error) {
	h := make([]float32, b.dim())
	h[b.index(p)] = 1
	return h, nil
}

func (b treeBackbone) OutputHead() (int, int, []float32) {
	d := b.dim()
	w := make([]float32, b.arity*d)
	for a := range b.arity {
		w[a*d+a] = 1
	}
	return b.arity, d, w
}

// posBackbone describes a prefix by the one-hot code of its length followed
// by one one-hot block per position holding the token there (zeros past
// the prefix), a crude stand-in for a language model's hidden state that
// lets the policy generalise across prefixes. The head is a fixed Gaussian
// matrix (seeded), wider than the vocabulary so any Q vector is reachable.
type posBackbone struct {
	vocab, length int
	head          []float32
}

func newPosBackbone(vocab, length int, seed uint64) *posBackbone {
	b := &posBackbone{vocab: vocab, length: length}
	d := b.dim()
	rng := rand.New(rand.NewPCG(seed, 1))
	b.head = make([]float32, vocab*d)
	for i := range b.head {
		b.head[i] = float32(rng.NormFloat64() / math.Sqrt(float64(d)))
	}
	return b
}

func (b *posBackbone) dim() int { return b.length + 1 + b.length*b.vocab }

func (b *posBackbone) Hidden(ctx context.Context, p []int) ([]float32, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	h := make([]float32, b.dim())
	h[len(p)] = 1
	for i, a := range p {
		h[b.length+1+i*b.vocab+a] = 1
	}
	return h, nil
}

func (b *posBackbone) OutputHead() (int, int, []float32) { return b.vocab, b.dim(), b.head }

func newTrainer(tb testing.TB, b policy.Backbone, cfg policy.Config) *policy.Trainer {
	tb.Helper()
	tr, err := policy.NewTrainer(b, cfg)
	require.NoError(tb, err, "NewTrainer")
	return tr
}

// train runs steps rounds of Sample(batch) → score → Update and returns
// the number of reward calls made.
func train(tb testing.TB, tr *policy.Trainer, steps, batch int, reward func([]int) float64) int {
	tb.Helper()
	ctx := context.Background()
	calls := 0
	for range steps {
		prompts, err := tr.Sample(ctx, batch)
		require.NoError(tb, err, "Sample")
		rs := make([]float64, len(prompts))
		for i, p := range prompts {
			rs[i] = reward(p)
			calls++
		}
		_, err = tr.Update(ctx, prompts, rs)
		require.NoError(tb, err, "Update")
	}
	return calls
}
