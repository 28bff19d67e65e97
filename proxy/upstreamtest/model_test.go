package upstreamtest

import (
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
)

func TestVocabulary(t *testing.T) {
	v := vocabulary()
	seen := map[string]bool{}
	for i, tok := range v {
		if seen[tok] {
			t.Errorf("token %q appears twice", tok)
		}
		seen[tok] = true
		word := i < len(v)-punctuationTokens
		if word && (!strings.HasPrefix(tok, " ") || strings.TrimSpace(tok) != tok[1:] || tok == " ") {
			t.Errorf("word token %d = %q; want one space then a word", i, tok)
		}
		if !word && len(tok) != 1 {
			t.Errorf("punctuation token %d = %q; want one mark", i, tok)
		}
	}
	if len(v) < 200 {
		t.Errorf("vocabulary has %d tokens; want a few hundred", len(v))
	}
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
		if !slices.Equal(got, tt.want) {
			t.Errorf("tokenize(%q) = %q; want %q", tt.in, got, tt.want)
		}
		if j := strings.Join(got, ""); j != tt.in {
			t.Errorf("tokens of %q join to %q", tt.in, j)
		}
	}
}

func TestRankInvariants(t *testing.T) {
	m := newModel(ModelLarge)
	rng := rand.New(rand.NewPCG(1, 2))
	for range 500 {
		h := rng.Uint64()
		c := m.rank(h)
		if c != m.rank(h) {
			t.Fatal("rank is not deterministic")
		}
		seen := map[string]bool{}
		var mass float64
		for i := range maxTop {
			if seen[c.toks[i]] {
				t.Fatalf("state %x: candidate %q twice", h, c.toks[i])
			}
			seen[c.toks[i]] = true
			if c.toks[i] != m.vocab[c.ids[i]] {
				t.Fatalf("state %x: toks[%d] = %q; want %q", h, i, c.toks[i], m.vocab[c.ids[i]])
			}
			if c.lps[i] >= 0 || math.IsNaN(c.lps[i]) {
				t.Fatalf("state %x: logprob %v not negative", h, c.lps[i])
			}
			if i > 0 && c.lps[i] >= c.lps[i-1] {
				t.Fatalf("state %x: logprobs not strictly decreasing at %d", h, i)
			}
			mass += math.Exp(c.lps[i])
		}
		if mass >= 1 {
			t.Fatalf("state %x: candidate probabilities sum to %v; want < 1", h, mass)
		}
	}
}

func TestGenerateGreedyPrefix(t *testing.T) {
	m := newModel(ModelSmall)
	for _, text := range []string{"The skipper moors the barge", "Honey", "Every hive hums at dawn."} {
		p := m.promptOf(m.tokenize(text))
		long, _ := m.generate(p, 40, nil, nil)
		for n := 0; n <= len(long); n++ {
			short, finish := m.generate(p, n, nil, nil)
			if joinTokens(short) != joinTokens(long[:n]) {
				t.Fatalf("%q: %d-token answer %q is not the prefix of the longer %q", text, n, joinTokens(short), joinTokens(long))
			}
			if n < len(long) && finish != "length" {
				t.Errorf("%q: max %d tokens ended with %q before the longer answer did", text, n, finish)
			}
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
			if !strings.Contains(".!?", last) {
				t.Errorf("ended on its own after %q; want a sentence end", last)
			}
		case "length":
			lengths++
			if len(toks) != 16 {
				t.Errorf("finish length with %d tokens; want 16", len(toks))
			}
		}
	}
	if stops == 0 || lengths == 0 {
		t.Errorf("of 200 prompts, %d ended on their own and %d at the length; want some of each", stops, lengths)
	}
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
		if got != tt.want || ok != tt.wantOK {
			t.Errorf("stopCut(%q, %q) = %d, %v; want %d, %v", text, tt.stops, got, ok, tt.want, tt.wantOK)
		}
	}
}

func TestSamplingTopP(t *testing.T) {
	m := newModel(ModelSmall)
	c := m.rank(42)
	s := &sampling{temperature: 1, topP: 0, rng: rand.New(rand.NewPCG(3, 4))}
	for range 50 {
		if i := s.pick(&c); i != 0 {
			t.Fatalf("top_p 0 picked candidate %d; want 0 (only the top one is kept)", i)
		}
	}
	s.topP = 1
	picked := map[int]bool{}
	for range 500 {
		picked[s.pick(&c)] = true
	}
	if len(picked) < 3 {
		t.Errorf("temperature 1 picked %d distinct candidates in 500 draws; want several", len(picked))
	}
}
