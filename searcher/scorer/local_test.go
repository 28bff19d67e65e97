package scorer

import (
	"context"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/reward"
)

// vocabSize is the stories260K vocabulary size (MODEL-SOURCE.md: 512 tokens).
const vocabSize = 512

// The batched call must give the numbers one-by-one calls give: the local
// model's README states batched and token-by-token prompt processing agree
// bit for bit, and a prompt array is the same prompts in one forward batch.
func TestBatchedEqualsOneByOne(t *testing.T) {
	base := localServer(t)
	_, texts := exampleTexts(t, 4, "Note:", "the little tree")
	ctx := context.Background()
	batched, err := newClient(t, Options{BaseURL: base, Model: "stories260K", TopLogprobs: 8, BatchSize: 8}).Score(ctx, texts)
	require.NoError(t, err)
	single, err := newClient(t, Options{BaseURL: base, Model: "stories260K", TopLogprobs: 8, BatchSize: 1, Concurrency: 3}).Score(ctx, texts)
	require.NoError(t, err)
	require.Falsef(t, len(batched.Calls) != 1 || len(single.Calls) != len(texts), "calls = %d and %d, want 1 and %d", len(batched.Calls), len(single.Calls), len(texts))
	for i := range texts {
		b, s := batched.Top[i], single.Top[i]
		require.Falsef(t, len(b) != 8 || len(s) != 8, "text %d: %d and %d log-probabilities, want 8", i, len(b), len(s))
		for tok, lp := range s {
			assert.Equal(t, lp, b[tok], "text %d token %q: batched %v, single %v", i, tok, b[tok], lp)
		}
	}
	// Usage: one call's prompt_tokens is the sum of the single calls'.
	bt, st := Sum(batched.Calls).Usage.PromptTokens, Sum(single.Calls).Usage.PromptTokens
	assert.Falsef(t, bt != st || bt == 0, "prompt tokens batched %d, single %d", bt, st)
	got := Sum(batched.Calls).CachedPrompts
	assert.Equal(t, 0, got, "cached prompts without a proxy = %d, want 0", got)
}

// With the whole vocabulary asked for, every verbalizer is present and the
// probabilities form a distribution (they sum to 1, a property of softmax).
func TestVerbalizersAndFullDistribution(t *testing.T) {
	base := localServer(t)
	tk, texts := exampleTexts(t, 3, "Note:")
	for _, ep := range []Endpoint{Completions, Chat} {
		t.Run(string(ep), func(t *testing.T) {
			c := newClient(t, Options{BaseURL: base, Model: "stories260K", Endpoint: ep, TopLogprobs: vocabSize})
			res, err := c.Score(context.Background(), texts)
			require.NoError(t, err)
			for i, top := range res.Top {
				var sum float64
				for _, lp := range top {
					sum += math.Exp(lp)
				}
				assert.Falsef(t, math.Abs(sum-1) > 1e-3, "text %d: probabilities sum to %v, want 1", i, sum)
				for _, v := range tk.Verbalizers() {
					lp, ok := top[v]
					assert.Falsef(t, !ok || lp >= 0, "text %d: verbalizer %q log-probability %v, %v", i, v, lp, ok)
				}
			}
			assert.Falsef(t, ep == Chat && len(res.Calls) != len(texts), "chat made %d calls for %d texts", len(res.Calls), len(texts))
		})
	}
}

// A shallow top-k list leaves verbalizers out; the reward floors them and
// counts how often, so a search can tell the answer was cut.
func TestShallowTopKFeedsReward(t *testing.T) {
	base := localServer(t)
	tk, texts := exampleTexts(t, 4, "Note:", "the big day")
	res, err := newClient(t, Options{BaseURL: base, Model: "stories260K", TopLogprobs: 2}).Score(context.Background(), texts)
	require.NoError(t, err)
	top := [][]map[string]float64{res.Top[:4], res.Top[4:]}
	truth := make([]int, 4)
	for i, ex := range tk.Dev[:4] {
		truth[i] = tk.LabelIndex(ex.Label)
	}
	step, err := reward.Config{}.Score(top, truth, tk.Verbalizers())
	require.NoError(t, err)
	missing := 0
	for _, m := range res.Top {
		require.Len(t, m, 2, "%d log-probabilities, want 2", len(m))
		for _, v := range tk.Verbalizers() {
			if _, ok := m[v]; !ok {
				missing++
			}
		}
	}
	assert.Falsef(t, step.Floored != missing || step.Lookups != 16, "floored %d of %d look-ups, counted %d missing of 16", step.Floored, step.Lookups, missing)
}
