package policy_test

import (
	"context"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/policy"
)

// benchTrainer is the default configuration (L = 5, Hidden 256, top-256 of
// the 512-token vocabulary) on the real model.
func benchTrainer(b *testing.B, cache int) *policy.Trainer {
	b.Helper()
	l, err := policy.NewLocal(realModel(b), policy.LocalOptions{CacheEntries: cache})
	require.NoError(b, err)
	return newTrainer(b, l, policy.Config{Seed: 1})
}

// BenchmarkSample draws 16 prompts per op; with the cache on, prefixes met
// in earlier ops are not recomputed.
func BenchmarkSample(b *testing.B) {
	for _, bc := range []struct {
		name  string
		cache int
	}{{"cached", 0}, {"uncached", -1}} {
		b.Run(bc.name, func(b *testing.B) {
			tr := benchTrainer(b, bc.cache)
			ctx := context.Background()
			for b.Loop() {
				if _, err := tr.Sample(ctx, 16); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// BenchmarkUpdate is one soft Q-learning step on 16 prompts whose hidden
// states are cached (as after Sample), so it measures the trainer's own
// cost: online and target forward, backward, Adam, Polyak.
func BenchmarkUpdate(b *testing.B) {
	tr := benchTrainer(b, 0)
	ctx := context.Background()
	prompts, err := tr.Sample(ctx, 16)
	require.NoError(b, err)
	rewards := make([]float64, len(prompts))
	for i := range rewards {
		rewards[i] = float64(i % 3)
	}
	for b.Loop() {
		if _, err := tr.Update(ctx, prompts, rewards); err != nil {
			b.Fatal(err)
		}
	}
}
