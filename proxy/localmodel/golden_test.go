package localmodel

import (
	"math"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// The model's published greedy output: llama2.c doc/stories260K.md, for
// `./run stories260K.bin -z tok512.bin -t 0.0`, as recorded in
// ../shared/models/MODEL-SOURCE.md ("Known-good output"): 256 steps from
// BOS begin with goldenStart and end with goldenEnd.
const (
	goldenStart = "Once upon a time, there was a little girl named Lily. She loved to play outside in the park. One day, she saw a big, red ball. She wanted to play with it, but it was too high."
	goldenEnd   = `Her mom said, "Don't worry, Lily. We can help you.`
)

func TestGoldenGreedy256(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	r := complete(t, srv, map[string]any{"prompt": "", "temperature": 0, "max_tokens": 256})
	got := r.Choices[0].Text
	assert.True(t, strings.HasPrefix(got, goldenStart), "text starts %q, want %q", got[:min(len(got), len(goldenStart))], goldenStart)
	assert.True(t, strings.HasSuffix(got, goldenEnd), "text ends %q, want %q", got[max(0, len(got)-len(goldenEnd)):], goldenEnd)
	assert.False(t, r.Usage.CompletionTokens != 256 || r.Usage.PromptTokens != 1 || *r.Choices[0].FinishReason != "length", "usage %+v finish %s; want 1 prompt (BOS), 256 completion, length", r.Usage, *r.Choices[0].FinishReason)
}

// TestFirstSentence checks that the model's published first sentence comes out
// of POST /v1/completions with prompt "" at temperature 0 (source above).
func TestFirstSentence(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	r := complete(t, srv, map[string]any{"prompt": "", "temperature": 0, "max_tokens": 20, "stop": "."})
	got, want := r.Choices[0].Text+".", "Once upon a time, there was a little girl named Lily."
	assert.Equal(t, want, got, "got %q, want %q", got, want)
}

// TestLogprobsAreADistribution: over the full vocabulary the returned
// log-probabilities exponentiate to 1 (within 1e-4) and
// the greedy token is the top-1 alternative.
func TestLogprobsAreADistribution(t *testing.T) {
	m := loadModel(t)
	srv, _ := testServer(t, m, HandlerOptions{})
	r := complete(t, srv, map[string]any{"prompt": "Lily and Tim", "temperature": 0, "max_tokens": 6, "logprobs": m.VocabSize()})
	lp := r.Choices[0].Logprobs
	require.Len(t, lp.Tokens, 6, "got %d tokens, want 6", len(lp.Tokens))
	for i, top := range lp.TopLogprobs {
		require.Equal(t, m.VocabSize(), top.Len(), "token %d: %d alternatives, want %d", i, top.Len(), m.VocabSize())
		var sum float64
		best, bestLP := "", math.Inf(-1)
		for tok, v := range top.Map() {
			sum += math.Exp(v)
			if v > bestLP {
				best, bestLP = tok, v
			}
		}
		assert.False(t, math.Abs(sum-1) > 1e-4, "token %d: probabilities sum to %v, want 1 ± 1e-4", i, sum)
		assert.False(t, best != lp.Tokens[i] || bestLP != *lp.TokenLogprobs[i], "token %d: greedy %q (%v), top-1 %q (%v)", i, lp.Tokens[i], *lp.TokenLogprobs[i], best, bestLP)
	}
}
