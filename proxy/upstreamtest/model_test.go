package upstreamtest

import (
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestVocabulary(t *testing.T) {
	v := vocabulary()
	seen := map[string]bool{}
	for i, tok := range v {
		assert.False(t, seen[tok], "token %q appears twice", tok)
		seen[tok] = true
		word := i < len(v)-punctuationTokens
		assert.False(t, word && (!strings.HasPrefix(tok, " ") || strings.TrimSpace(tok) != tok[1:] || tok == " "), "word token %d = %q; want one space then a word", i, tok)
		assert.False(t, !word && len(tok) != 1, "punctuation token %d = %q; want one mark", i, tok)
	}
	assert.GreaterOrEqual(t, len(v), 200, "vocabulary has %d tokens; want a few hundred", len(v))
}

func TestTokenizeConcatenates(t *testing.T) {
	m := newModel(ModelSmall)
	tests := []struct {
		in   string
		want []string
	}{
		{"The barge drifts.", []string{"The", " barge", " drifts", "."}},
		{"  two  spaces ,then\n", []string{"  two", "  spaces", " ,", "then", "\n"}},
		{"", nil},
		{"keeper's log-book: 12 jars!", []string{"keeper's", " log-book", ":", " 12", " jars", "!"}},
		{"\xff\xfe bad bytes", []string{"\xff", "\xfe", " bad", " bytes"}},
	}
	for _, tt := range tests {
		got := m.tokenize(tt.in)
		assert.True(t, slices.Equal(got, tt.want), "tokenize(%q) = %q; want %q", tt.in, got, tt.want)
		j := strings.Join(got, "")
		assert.Equal(t, tt.in, j, "tokens of %q join to %q", tt.in, j)
	}
}

func TestRankInvariants(t *testing.T) {
	m := newModel(ModelLarge)
	rng := rand.New(rand.NewPCG(1, 2))
	for range 500 {
		h := rng.Uint64()
		c := m.rank(h)
		require.True(t, c == m.rank(h), "rank is not deterministic")
		seen := map[string]bool{}
		var mass float64
		for i := range maxTop {
			require.False(t, seen[c.toks[i]], "state %x: candidate %q twice", h, c.toks[i])
			seen[c.toks[i]] = true
			require.Equal(t, m.vocab[c.ids[i]], c.toks[i], "state %x: toks[%d] = %q; want %q", h, i, c.toks[i], m.vocab[c.ids[i]])
			require.Less(t, c.lps[i], float64(0), "state %x: logprob %v not negative", h, c.lps[i])
			require.False(t, math.IsNaN(c.lps[i]), "state %x: logprob %v not negative", h, c.lps[i])
			require.False(t, i > 0 && c.lps[i] >= c.lps[i-1], "state %x: logprobs not strictly decreasing at %d", h, i)
			mass += math.Exp(c.lps[i])
		}
		require.False(t, mass >= 1, "state %x: candidate probabilities sum to %v; want < 1", h, mass)
	}
}

func TestGenerateGreedyPrefix(t *testing.T) {
	m := newModel(ModelSmall)
	for _, text := range []string{"The skipper moors the barge", "Honey", "Every hive hums at dawn."} {
		p := m.promptOf(m.tokenize(text))
		long, _ := m.generate(p, 40, nil, nil)
		for n := 0; n <= len(long); n++ {
			short, finish := m.generate(p, n, nil, nil)
			require.Equal(t, joinTokens(long[:n]), joinTokens(short), "%q: %d-token answer %q is not the prefix of the longer %q", text, n, joinTokens(short), joinTokens(long))
			assert.False(t, n < len(long) && finish != "length", "%q: max %d tokens ended with %q before the longer answer did", text, n, finish)
		}
	}
}

func TestGenerateEndsOnItsOwn(t *testing.T) {
	m := newModel(ModelSmall)
	stops, lengths := 0, 0
	for i := range 200 {
		p := m.promptOf(m.tokenize("barge " + string(rune('a'+i%26)) + strings.Repeat(" hive", i/26)))
		toks, finish := m.generate(p, 16, nil, nil)
		switch finish {
		case "stop":
			stops++
			last := toks[len(toks)-1].text
			assert.Contains(t, ".!?", last, "ended on its own after %q; want a sentence end", last)
		case "length":
			lengths++
			assert.Len(t, toks, 16, "finish length with %d tokens; want 16", len(toks))
		}
	}
	assert.NotEqual(t, 0, stops, "of 200 prompts, %d ended on their own and %d at the length; want some of each", stops, lengths)
	assert.NotEqual(t, 0, lengths, "of 200 prompts, %d ended on their own and %d at the length; want some of each", stops, lengths)
}

func TestStopCut(t *testing.T) {
	toks := func(ss ...string) []token {
		out := make([]token, len(ss))
		for i, s := range ss {
			out[i] = token{text: s}
		}
		return out
	}
	tests := []struct {
		toks   []token
		stops  []string
		want   int
		wantOK bool
	}{
		{toks(" the", " hive", "."), []string{"."}, 2, true},
		{toks(" the", " hive", "."), []string{"ive"}, 1, true},  // begins inside " hive": cut before it
		{toks(" the", " hive", "."), []string{" the"}, 0, true}, // at the very start
		{toks(" the", " hive", "."), []string{"x", "e h"}, 0, true},
		{toks(" the", " hive", "."), []string{".", " hive"}, 1, true}, // the earliest wins
		{toks(" the", " hive", "."), []string{"queen"}, 0, false},
		{toks(" the", " hive", "."), []string{""}, 0, false},
	}
	for _, tt := range tests {
		text := joinTokens(tt.toks)
		got, ok := stopCut(tt.toks, text, tt.stops)
		assert.Equal(t, tt.want, got, "stopCut(%q, %q) cut", text, tt.stops)
		assert.Equal(t, tt.wantOK, ok, "stopCut(%q, %q) ok", text, tt.stops)
	}
}

func TestSamplingTopP(t *testing.T) {
	m := newModel(ModelSmall)
	c := m.rank(42)
	s := &sampling{temperature: 1, topP: 0, rng: rand.New(rand.NewPCG(3, 4))}
	for range 50 {
		i := s.pick(&c)
		require.Equal(t, 0, i, "top_p 0 picked candidate %d; want 0 (only the top one is kept)", i)
	}
	s.topP = 1
	picked := map[int]bool{}
	for range 500 {
		picked[s.pick(&c)] = true
	}
	assert.GreaterOrEqual(t, len(picked), 3, "temperature 1 picked %d distinct candidates in 500 draws; want several", len(picked))
}
