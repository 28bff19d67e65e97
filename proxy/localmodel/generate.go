package localmodel

import (
	"bytes"
	"context"
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"strings"
	"unicode/utf8"

	"github.com/stintlab/stint/proxy/localmodel/tokenizer"
)

// prefillChunk bounds how many prompt positions go through one forward
// call, so cancellation is noticed between chunks and scratch stays small.
const prefillChunk = 256

// genParams are the sampling settings shared by every choice of a request.
type genParams struct {
	maxTokens   int
	temperature float64
	topP        float64
	seed        *uint64
	stop        []string
	// logprobs is the number of top alternatives per token, or -1 for no
	// log-probabilities at all.
	logprobs int
	// promptLogprobs asks for log-probabilities of the prompt tokens.
	promptLogprobs bool
	// stripLead drops one leading space from every reply (the chat
	// template ends with "Assistant:"); replies to an empty prompt (BOS
	// alone) drop it anyway, as SentencePiece decoding does after BOS.
	stripLead bool
}

// tokenLogprob is one token with its log-probability and alternatives.
type tokenLogprob struct {
	id    int
	lp    float64
	top   []idLogprob
	valid bool // false for the first prompt token, whose logprob is null
}

type idLogprob struct {
	id int
	lp float64
}

// choice is one generated continuation.
type choice struct {
	index  int
	prompt int // index of its prompt
	seq    *sequence
	rng    *rand.Rand
	logits []float32 // next-token logits

	text    []byte
	starts  []int // byte offset of each generated token in text
	toks    []tokenLogprob
	ntoks   int // tokens generated (counts tokens cut by a stop string)
	emitted int // bytes of text already emitted
	emitTok int // tokens already emitted
	finish  string
	maxStop int
	// stripLead drops one leading space from the first token's text.
	stripLead bool
	searched  int // text bytes already searched for stop strings
}

// delta is what a choice adds in one emission.
type delta struct {
	text string
	toks []tokenLogprob
	// starts are the tokens' byte offsets in the whole choice text.
	starts []int
	finish string // "" until the choice ends
}

// promptState is a tokenized prompt after prefill.
type promptState struct {
	tokens []int // with BOS
	seq    *sequence
	lps    []tokenLogprob // prompt-token log-probabilities, when asked
	reused int            // positions copied from the prefix cache
}

// engine runs requests on a model with an optional prefix cache.
type engine struct {
	m     *Model
	cache *prefixCache
}

// prefill builds the sequence for one prompt (BOS included in tokens),
// reusing the longest cached prefix, and returns it with the logits of its
// last position.
func (e *engine) prefill(ctx context.Context, ws *workspace, tokens []int, wantPromptLogprobs bool, topK int) (*promptState, []float32, error) {
	m := e.m
	dim, kvDim := m.cfg.Dim, m.cfg.kvDim()
	ps := &promptState{tokens: tokens}
	var seq *sequence
	if base, n := e.cache.longest(tokens); n > 0 {
		// Recompute at least the last token, whose logits we need only
		// through hidden; copying all n positions is fine since hidden
		// is cached too.
		seq = base.clone(n, kvDim, dim)
		ps.reused = n
	} else {
		seq = m.newSequence()
	}
	for len(seq.tokens) < len(tokens) {
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		end := min(len(tokens), len(seq.tokens)+prefillChunk)
		chunk := tokens[len(seq.tokens):end]
		seqs := make([]*sequence, len(chunk))
		for i := range seqs {
			seqs[i] = seq
		}
		if _, _, err := m.forward(ctx, ws, seqs, chunk, nil); err != nil {
			return nil, nil, err
		}
	}
	ps.seq = seq
	if ps.reused < len(tokens) {
		e.cache.add(seq.clone(len(tokens), kvDim, dim))
	}
	last := len(tokens) - 1
	hidden := Matrix{Rows: len(tokens), Cols: dim, Data: seq.hidden}
	logits := make([]float32, m.cfg.VocabSize)
	m.head(logits, hidden, []int{last})
	if wantPromptLogprobs && len(tokens) > 1 {
		// Token i (i ≥ 1, after BOS) is predicted by position i-1; the
		// first prompt token's entry is null by convention.
		rows := make([]int, 0, len(tokens)-2)
		for i := 1; i < last; i++ {
			rows = append(rows, i)
		}
		all := make([]float32, len(rows)*m.cfg.VocabSize)
		m.head(all, hidden, rows)
		ps.lps = append(ps.lps, tokenLogprob{id: tokens[1]})
		v := m.cfg.VocabSize
		for j := range rows {
			ps.lps = append(ps.lps, logprobOf(all[j*v:(j+1)*v], tokens[j+2], topK))
		}
	}
	return ps, logits, nil
}

// logprobOf returns token id's log-probability under logits with the topK
// most likely alternatives.
func logprobOf(logits []float32, id, topK int) tokenLogprob {
	lse := logSumExp(logits)
	tl := tokenLogprob{id: id, lp: float64(logits[id]) - lse, valid: true}
	if topK > 0 {
		idx := topIndices(logits, topK)
		tl.top = make([]idLogprob, len(idx))
		for i, j := range idx {
			tl.top[i] = idLogprob{id: j, lp: float64(logits[j]) - lse}
		}
	}
	return tl
}

func logSumExp(x []float32) float64 {
	mx := math.Inf(-1)
	for _, v := range x {
		mx = math.Max(mx, float64(v))
	}
	var s float64
	for _, v := range x {
		s += math.Exp(float64(v) - mx)
	}
	return mx + math.Log(s)
}

// topIndices returns the k largest entries' indices, largest first, lower
// index first on ties (so the first is the greedy argmax).
func topIndices(x []float32, k int) []int {
	idx := make([]int, len(x))
	for i := range idx {
		idx[i] = i
	}
	k = min(k, len(x))
	if k <= 16 {
		// Partial selection: k passes are cheaper than a sort here.
		for i := 0; i < k; i++ {
			best := i
			for j := i + 1; j < len(idx); j++ {
				if x[idx[j]] > x[idx[best]] || (x[idx[j]] == x[idx[best]] && idx[j] < idx[best]) {
					best = j
				}
			}
			idx[i], idx[best] = idx[best], idx[i]
		}
		return idx[:k]
	}
	sort.SliceStable(idx, func(a, b int) bool { return x[idx[a]] > x[idx[b]] })
	return idx[:k]
}

// argmax returns the first index of the largest value.
func argmax(x []float32) int {
	best := 0
	for i, v := range x {
		if v > x[best] {
			best = i
		}
	}
	return best
}

// sample draws the next token: argmax at temperature 0, else from the
// temperature-scaled distribution restricted to the top-p nucleus.
func sample(logits []float32, temperature, topP float64, rng *rand.Rand) int {
	if temperature == 0 {
		return argmax(logits)
	}
	mx := float64(logits[argmax(logits)])
	p := make([]float64, len(logits))
	var sum float64
	for i, v := range logits {
		p[i] = math.Exp((float64(v) - mx) / temperature)
		sum += p[i]
	}
	idx := make([]int, len(p))
	for i := range idx {
		idx[i] = i
	}
	if topP < 1 {
		sort.SliceStable(idx, func(a, b int) bool { return p[idx[a]] > p[idx[b]] })
		var acc float64
		for i, j := range idx {
			acc += p[j]
			if acc >= topP*sum {
				idx = idx[:i+1]
				break
			}
		}
		sum = acc
	}
	r := rng.Float64() * sum
	for _, j := range idx {
		r -= p[j]
		if r < 0 {
			return j
		}
	}
	return idx[len(idx)-1]
}

// push appends token id to c's text and checks the stop conditions.
func (c *choice) push(m *Model, id int, gp *genParams, tl tokenLogprob) {
	c.ntoks++
	if id == m.tok.EOS() || id == m.tok.BOS() {
		c.finish = "stop"
		return
	}
	b := m.tok.Bytes(id)
	if c.stripLead && len(c.text) == 0 && len(c.starts) == 0 && len(b) > 0 && b[0] == ' ' {
		b = b[1:]
	}
	c.starts = append(c.starts, len(c.text))
	c.toks = append(c.toks, tl)
	c.text = append(c.text, b...)
	for _, s := range gp.stop {
		from := max(0, c.searched-len(s)+1)
		if i := bytes.Index(c.text[from:], []byte(s)); i >= 0 {
			c.cut(from + i)
			c.finish = "stop"
			return
		}
	}
	c.searched = len(c.text)
	if c.ntoks >= gp.maxTokens {
		c.finish = "length"
	}
}

// cut truncates the text at n bytes and drops tokens starting at or after it.
func (c *choice) cut(n int) {
	c.text = c.text[:n]
	k := sort.SearchInts(c.starts, n)
	// Tokens starting exactly at n begin with the stop string: drop them.
	c.starts, c.toks = c.starts[:k], c.toks[:k]
}

// take returns the text and tokens safe to emit now: everything once the
// choice has finished, else all but a tail that could still be the start of
// a stop string or is an incomplete UTF-8 sequence.
func (c *choice) take() delta {
	end := len(c.text)
	if c.finish == "" {
		end -= max(0, c.maxStop-1)
		// Back up to a rune start, and over an incomplete final rune.
		for end > c.emitted && end < len(c.text) && !utf8.RuneStart(c.text[end]) {
			end--
		}
		if end > c.emitted {
			i := end - 1
			for i > c.emitted && !utf8.RuneStart(c.text[i]) {
				i--
			}
			if !utf8.FullRune(c.text[i:end]) {
				end = i
			}
		}
	}
	end = max(end, c.emitted)
	d := delta{text: string(c.text[c.emitted:end]), finish: c.finish}
	k := c.emitTok
	for k < len(c.toks) && c.starts[k] < end {
		k++
	}
	if c.finish != "" {
		k = len(c.toks) // includes tokens with no text of their own
	}
	d.toks = c.toks[c.emitTok:k]
	d.starts = c.starts[c.emitTok:k]
	c.emitted, c.emitTok = end, k
	return d
}

// run generates n choices for each prompt (tokens include BOS) and calls
// emit with each choice's progress after every step (and once at the end
// of each choice, with finish set). It returns the prompt states and
// choices for the final response.
func (e *engine) run(ctx context.Context, prompts [][]int, n int, gp *genParams, emitPrompt func(*promptState, int), emit func(*choice, delta)) ([]*promptState, []*choice, error) {
	m := e.m
	var ws workspace
	maxStop := 0
	for _, s := range gp.stop {
		maxStop = max(maxStop, len(s))
	}
	var base uint64
	if gp.seed != nil {
		base = *gp.seed
	} else {
		base = rand.Uint64()
	}
	states := make([]*promptState, len(prompts))
	var choices []*choice
	topK := max(gp.logprobs, 0)
	for pi, toks := range prompts {
		ps, logits, err := e.prefill(ctx, &ws, toks, gp.promptLogprobs, topK)
		if err != nil {
			return nil, nil, err
		}
		states[pi] = ps
		if emitPrompt != nil {
			emitPrompt(ps, pi)
		}
		for j := 0; j < n; j++ {
			c := &choice{index: pi*n + j, prompt: pi, maxStop: maxStop,
				rng: rand.New(rand.NewPCG(base, uint64(pi*n+j))), logits: logits,
				stripLead: gp.stripLead || len(toks) == 1}
			if j == n-1 {
				c.seq = ps.seq
			} else {
				c.seq = ps.seq.clone(len(ps.seq.tokens), m.cfg.kvDim(), m.cfg.Dim)
			}
			if gp.maxTokens == 0 {
				c.finish = "length"
			}
			choices = append(choices, c)
		}
	}
	active := slices.Clone(choices)
	for len(active) > 0 {
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		var seqs []*sequence
		var toks []int
		var next []*choice
		for _, c := range active {
			if c.finish == "" {
				id := sample(c.logits, gp.temperature, gp.topP, c.rng)
				var tl tokenLogprob
				if gp.logprobs >= 0 {
					tl = logprobOf(c.logits, id, gp.logprobs)
				} else {
					tl = tokenLogprob{id: id, valid: true}
				}
				c.push(m, id, gp, tl)
				if c.finish == "" && len(c.seq.tokens) >= m.cfg.ContextLength {
					c.finish = "length"
				}
				if c.finish == "" {
					seqs = append(seqs, c.seq)
					toks = append(toks, id)
					next = append(next, c)
				}
			}
			if emit != nil {
				emit(c, c.take())
			}
		}
		if len(next) == 0 {
			break
		}
		rows := make([]int, len(next))
		for i := range rows {
			rows[i] = i
		}
		_, logits, err := m.forward(ctx, &ws, seqs, toks, rows)
		if err != nil {
			return nil, nil, err
		}
		for i, c := range next {
			c.logits = logits.Row(i)
		}
		active = next
	}
	return states, choices, nil
}

// promptText returns the text of prompt tokens (BOS excluded) and each
// token's byte offset in it, dropping the dummy space prefix like Decode.
func promptText(m *Model, tokens []int) (string, []int) {
	var b strings.Builder
	starts := make([]int, 0, len(tokens))
	for i, id := range tokens {
		p := m.tok.Bytes(id)
		if i == 0 && len(p) > 0 && p[0] == ' ' && m.tok.Type(id) != tokenizer.TypeByte {
			p = p[1:]
		}
		starts = append(starts, b.Len())
		b.Write(p)
	}
	return b.String(), starts
}
