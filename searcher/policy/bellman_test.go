package policy_test

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/policy"
)

// softValues solves the soft Bellman equation on the tree (Haarnoja et al.
// 2017, eq. 2–3; Guo et al. 2021, eq. 5 with γ = 1): Q*(s, a) = r(s, a) +
// V*(s') and V*(s) = log Σ_a exp Q*(s, a), with V* = 0 at the leaves and
// the reward only on the last step. leaf[i] is the reward of the prompt
// whose tokens read i in base arity. It returns Q* of every non-terminal
// state, keyed by the prefix.
func softValues(b treeBackbone, leaf []float64) map[string][]float64 {
	q := make(map[string][]float64)
	var v func(p []int) float64
	v = func(p []int) float64 {
		if len(p) == b.depth {
			return 0
		}
		qs := make([]float64, b.arity)
		for a := range b.arity {
			next := append(append([]int(nil), p...), a)
			qs[a] = v(next)
			if len(next) == b.depth {
				qs[a] = leaf[leafIndex(b.arity, next)]
			}
		}
		q[fmt.Sprint(p)] = qs
		m := 0.0
		for _, x := range qs {
			m += math.Exp(x)
		}
		return math.Log(m)
	}
	v(nil)
	return q
}

func leafIndex(arity int, p []int) int {
	i := 0
	for _, a := range p {
		i = i*arity + a
	}
	return i
}

// TestSoftBellman trains on an enumerable tree with a tabular network and
// checks the learned Q and V against the exact soft values.
func TestSoftBellman(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 7))
	random := make([]float64, 27)
	for i := range random {
		random[i] = 2 * rng.Float64()
	}
	tests := []struct {
		name  string
		tree  treeBackbone
		leaf  []float64
		steps int
	}{
		// One step, rewards log 1, log 2, log 3: V*(root) = log 6 by hand.
		{"depth 1", treeBackbone{arity: 3, depth: 1}, []float64{0, math.Log(2), math.Log(3)}, 600},
		{"depth 2", treeBackbone{arity: 4, depth: 2}, random[:16], 2000},
		{"depth 3", treeBackbone{arity: 3, depth: 3}, random, 3000},
	}
	const tol = 0.02
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tr := newTrainer(t, tc.tree, policy.Config{
				PromptLength: tc.tree.depth, Hidden: 32, LearningRate: 1e-2, Polyak: 0.05, Seed: 1,
			})
			train(t, tr, tc.steps, 16, func(p []int) float64 { return tc.leaf[leafIndex(tc.tree.arity, p)] })
			want := softValues(tc.tree, tc.leaf)
			worst := 0.0
			for key, wq := range want {
				p := parsePrefix(key)
				gq, err := tr.QValues(context.Background(), p)
				require.NoError(t, err)
				for a := range wq {
					worst = max(worst, math.Abs(gq[a]-wq[a]))
					assert.Falsef(t, math.Abs(gq[a]-wq[a]) > tol, "Q(%v, %d) = %.4f, want %.4f (soft Bellman)", p, a, gq[a], wq[a])
				}
			}
			t.Logf("largest |Q − Q*| = %.2g", worst)
		})
	}
}

func parsePrefix(s string) []int {
	var p []int
	var cur int
	in := false
	for _, c := range s {
		switch {
		case c >= '0' && c <= '9':
			cur, in = cur*10+int(c-'0'), true
		case in:
			p, cur, in = append(p, cur), 0, false
		}
	}
	return p
}
