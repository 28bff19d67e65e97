package upstreamtest

import (
	"hash/fnv"
	"math"
	"math/rand/v2"
	"regexp"
	"strings"
)

// maxTop is the largest number of top log-probabilities a request may ask
// for, and the number of candidates the toy model ranks at each position.
const maxTop = 20

// model is the toy language model behind the fake. It is a hash model: the
// state after a prefix is a hash of the model name and the prefix's tokens,
// and the state alone decides the ranked candidates for the next token and
// their log-probabilities. So a greedy answer depends only on the prompt,
// and a longer greedy answer extends a shorter one.
//
// A model is immutable and safe for concurrent use.
type model struct {
	name    string
	vocab   []string
	index   map[string]int
	nWords  int
	splitRE *regexp.Regexp
}

func newModel(name string) *model {
	vocab := vocabulary()
	m := &model{
		name:   name,
		vocab:  vocab,
		index:  make(map[string]int, len(vocab)),
		nWords: len(vocab) - punctuationTokens,
		// A token is a word with its leading white space, one
		// punctuation mark with its leading white space, or trailing
		// white space: the pieces concatenate back to the text.
		splitRE: regexp.MustCompile(`\s*[\p{L}\p{N}_'’-]+|\s*[^\s\p{L}\p{N}_'’-]|\s+`),
	}
	for i, t := range vocab {
		m.index[t] = i
	}
	return m
}

// tokenize splits text into tokens that concatenate exactly to text.
func (m *model) tokenize(text string) []string { return m.splitRE.FindAllString(text, -1) }

// candidates is the ranked next-token distribution at one state.
type candidates struct {
	ids  [maxTop]int     // vocabulary ids, most likely first, distinct
	toks [maxTop]string  // the tokens of ids
	lps  [maxTop]float64 // natural-log probabilities, strictly decreasing, sum of exp < 1
}

// start returns the state before any token.
func (m *model) start() uint64 { return mix(hashString(m.name) ^ 0x5717_c0de) }

// advance returns the state after appending token t.
func advance(h uint64, t string) uint64 { return mix(h ^ hashString(t)) }

// rank returns the candidates at state h.
func (m *model) rank(h uint64) candidates {
	rng := rand.New(rand.NewPCG(h, h^0x9e3779b97f4a7c15))
	var c candidates
	// About one position in eight puts a punctuation mark first.
	if rng.Float64() < 0.125 {
		c.ids[0] = m.nWords + rng.IntN(punctuationTokens)
	} else {
		c.ids[0] = rng.IntN(m.nWords)
	}
	seen := map[int]bool{c.ids[0]: true}
	for i := 1; i < maxTop; i++ {
		id := rng.IntN(len(m.vocab))
		for seen[id] {
			id = rng.IntN(len(m.vocab))
		}
		seen[id] = true
		c.ids[i] = id
	}
	// Geometric weights with a random decay; the candidates share a
	// mass below one, the rest belongs to the unranked vocabulary.
	decay := 0.2 + 0.6*rng.Float64()
	mass := 0.8 + 0.18*rng.Float64()
	var sum float64
	for i := range maxTop {
		sum += math.Exp(-decay * float64(i))
	}
	for i := range maxTop {
		c.lps[i] = math.Log(mass * math.Exp(-decay*float64(i)) / sum)
		c.toks[i] = m.vocab[c.ids[i]]
	}
	return c
}

// logprobOf returns the log-probability of token t at state h given its
// candidates: its ranked value, or a value below every ranked one.
func (c *candidates) logprobOf(m *model, h uint64, t string) float64 {
	if id, ok := m.index[t]; ok {
		for i, cid := range c.ids {
			if cid == id {
				return c.lps[i]
			}
		}
	}
	frac := float64(mix(h^hashString(t))%1000) / 1000
	return c.lps[maxTop-1] - 1 - 3*frac
}

// endsHere reports whether generation ends after token id was emitted,
// reaching state h: only after a sentence end, and then two times in five.
func (m *model) endsHere(id int, h uint64) bool {
	return id >= m.nWords && id < m.nWords+sentenceEnds && mix(h^0xe05)%5 < 2
}

// token is one generated or echoed token.
type token struct {
	text    string
	logprob float64 // log-probability; meaningless for the first echoed token
	cand    candidates
	first   bool // the first token of an echoed prompt, which has no log-probability
}

// sampling says how to choose among the candidates; a nil *sampling
// means greedy (temperature 0).
type sampling struct {
	temperature float64
	topP        float64
	rng         *rand.Rand
}

// pick chooses an index into the candidates.
func (s *sampling) pick(c *candidates) int {
	if s == nil || s.temperature == 0 {
		return 0
	}
	// Weights relative to the top candidate, so that a tiny temperature
	// (clients that cannot send 0 send the smallest float) tends to
	// greedy instead of overflowing.
	var w [maxTop]float64
	var total float64
	for i := range maxTop {
		w[i] = math.Exp((c.lps[i] - c.lps[0]) / s.temperature)
		total += w[i]
	}
	// Nucleus: keep the fewest leading candidates whose share reaches
	// top_p (at least one).
	keep, cum := 0, 0.0
	for keep < maxTop {
		cum += w[keep] / total
		keep++
		if cum >= s.topP {
			break
		}
	}
	var kept float64
	for i := range keep {
		kept += w[i]
	}
	x := s.rng.Float64() * kept
	for i := range keep {
		x -= w[i]
		if x < 0 {
			return i
		}
	}
	return keep - 1
}

// prompt is one prompt as tokens, with the state after them.
type prompt struct {
	tokens []string
	state  uint64
}

// promptOf returns the prompt for the given tokens.
func (m *model) promptOf(tokens []string) prompt {
	h := m.start()
	for _, t := range tokens {
		h = advance(h, t)
	}
	return prompt{tokens: tokens, state: h}
}

// echo returns the prompt's tokens with their log-probabilities.
func (m *model) echo(p prompt) []token {
	out := make([]token, len(p.tokens))
	h := m.start()
	for i, t := range p.tokens {
		c := m.rank(h)
		out[i] = token{text: t, cand: c, first: i == 0}
		if i > 0 {
			out[i].logprob = c.logprobOf(m, h, t)
		}
		h = advance(h, t)
	}
	return out
}

// generate continues prompt p by at most maxTokens tokens. It returns the
// tokens and the finish reason: "stop" when the model ended on its own or a
// stop sequence appeared, "length" otherwise. A stop sequence cuts the text
// at the boundary before the token in which it begins, so the text never
// contains it and the tokens still concatenate to the text.
func (m *model) generate(p prompt, maxTokens int, s *sampling, stops []string) ([]token, string) {
	var out []token
	var text strings.Builder
	h := p.state
	for len(out) < maxTokens {
		c := m.rank(h)
		i := s.pick(&c)
		id := c.ids[i]
		t := m.vocab[id]
		out = append(out, token{text: t, logprob: c.lps[i], cand: c})
		text.WriteString(t)
		h = advance(h, t)
		if cut, ok := stopCut(out, text.String(), stops); ok {
			return out[:cut], "stop"
		}
		if m.endsHere(id, h) {
			return out, "stop"
		}
	}
	return out, "length"
}

// stopCut finds the earliest stop sequence in text and returns how many
// leading tokens end at or before it.
func stopCut(toks []token, text string, stops []string) (int, bool) {
	at := -1
	for _, s := range stops {
		if i := strings.Index(text, s); s != "" && i >= 0 && (at < 0 || i < at) {
			at = i
		}
	}
	if at < 0 {
		return 0, false
	}
	n, end := 0, 0
	for _, t := range toks {
		end += len(t.text)
		if end > at {
			break
		}
		n++
	}
	return n, true
}

func hashString(s string) uint64 {
	h := fnv.New64a()
	h.Write([]byte(s))
	return h.Sum64()
}

// mix is the splitmix64 finalizer.
func mix(x uint64) uint64 {
	x ^= x >> 30
	x *= 0xbf58476d1ce4e5b9
	x ^= x >> 27
	x *= 0x94d049bb133111eb
	x ^= x >> 31
	return x
}
