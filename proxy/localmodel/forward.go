package localmodel

import (
	"context"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"sync"
)

// parallelRows is the number of rows per extra goroutine in attention.
const parallelRows = 32

// ErrContextFull means a sequence would grow past the model's context length.
var ErrContextFull = errors.New("localmodel: context length exceeded")

// ErrBadToken means a token id is outside the vocabulary.
var ErrBadToken = errors.New("localmodel: token id out of range")

// sequence is one token sequence with its KV cache. It is not safe for
// concurrent use.
type sequence struct {
	tokens []int
	// k and v hold, per layer, len(tokens) positions of kvDim floats.
	k, v [][]float32
	// hidden holds len(tokens) rows of Dim floats: the final-normed hidden
	// state at each position (logits = output head · hidden).
	hidden []float32
	// pending counts rows of the current forward call (scratch).
	pending int
}

func (m *Model) newSequence() *sequence {
	return &sequence{k: make([][]float32, m.cfg.Layers), v: make([][]float32, m.cfg.Layers)}
}

// clone returns an independent copy of the first n positions of s.
func (s *sequence) clone(n, kvDim, dim int) *sequence {
	c := &sequence{tokens: append([]int(nil), s.tokens[:n]...), k: make([][]float32, len(s.k)), v: make([][]float32, len(s.v))}
	for l := range s.k {
		c.k[l] = append([]float32(nil), s.k[l][:n*kvDim]...)
		c.v[l] = append([]float32(nil), s.v[l][:n*kvDim]...)
	}
	c.hidden = append([]float32(nil), s.hidden[:n*dim]...)
	return c
}

// workspace holds the scratch buffers of one forward call.
type workspace struct {
	x, xb, q, att, hb, hb2, kb, vb, scores []float32
	pos                                    []int
}

// extend lengthens b by n elements (overwritten by the caller), growing its
// capacity geometrically.
func extend[T any](b []T, n int) []T {
	return slices.Grow(b, n)[:len(b)+n]
}

func grow(b []float32, n int) []float32 {
	if cap(b) < n {
		return make([]float32, n)
	}
	return b[:n]
}

// forward appends toks[r] to seqs[r] for every row r (rows of one sequence
// must appear in order) and runs the model on all rows at once. It returns
// the final-normed hidden states (one row per input row; a view of ws) and
// fills logits (rows len(logitRows), a new matrix) for the rows listed.
func (m *Model) forward(ctx context.Context, ws *workspace, seqs []*sequence, toks []int, logitRows []int) (Matrix, Matrix, error) {
	c := m.cfg
	n := len(toks)
	dim, kvDim, hd := c.Dim, c.kvDim(), c.HeadDim
	for _, t := range toks {
		if t < 0 || t >= c.VocabSize {
			return Matrix{}, Matrix{}, fmt.Errorf("%w: %d (vocabulary %d)", ErrBadToken, t, c.VocabSize)
		}
	}
	ws.pos = ws.pos[:0]
	for _, s := range seqs {
		p := len(s.tokens) + s.pending
		if p >= c.ContextLength {
			for _, s := range seqs {
				s.pending = 0
			}
			return Matrix{}, Matrix{}, fmt.Errorf("%w: position %d of %d", ErrContextFull, p, c.ContextLength)
		}
		ws.pos = append(ws.pos, p)
		s.pending++
	}
	for _, s := range seqs {
		if s.pending == 0 {
			continue
		}
		s.tokens = extend(s.tokens, s.pending)
		for l := range s.k {
			s.k[l] = extend(s.k[l], s.pending*kvDim)
			s.v[l] = extend(s.v[l], s.pending*kvDim)
		}
		s.hidden = extend(s.hidden, s.pending*dim)
		s.pending = 0
	}
	for r, s := range seqs {
		s.tokens[ws.pos[r]] = toks[r]
	}

	ws.x = grow(ws.x, n*dim)
	ws.xb = grow(ws.xb, n*dim)
	ws.q = grow(ws.q, n*dim)
	ws.att = grow(ws.att, n*dim)
	ws.kb = grow(ws.kb, n*kvDim)
	ws.vb = grow(ws.vb, n*kvDim)
	ws.hb = grow(ws.hb, n*c.HiddenDim)
	ws.hb2 = grow(ws.hb2, n*c.HiddenDim)
	for r, t := range toks {
		copy(ws.x[r*dim:(r+1)*dim], m.embed[t*dim:(t+1)*dim])
	}
	scale := float32(1 / math.Sqrt(float64(hd)))
	group := c.Heads / c.KVHeads
	for li := range m.layers {
		if err := ctx.Err(); err != nil {
			return Matrix{}, Matrix{}, err
		}
		l := &m.layers[li]
		for r := 0; r < n; r++ {
			rmsnorm(ws.xb[r*dim:(r+1)*dim], ws.x[r*dim:(r+1)*dim], l.attnNorm, c.NormEps)
		}
		matmulT(ws.q, ws.xb, l.wq, n, dim, dim)
		matmulT(ws.kb, ws.xb, l.wk, n, dim, kvDim)
		matmulT(ws.vb, ws.xb, l.wv, n, dim, kvDim)
		for r, s := range seqs {
			p := ws.pos[r]
			m.rope(ws.q[r*dim:(r+1)*dim], p)
			k := s.k[li][p*kvDim : (p+1)*kvDim]
			copy(k, ws.kb[r*kvDim:(r+1)*kvDim])
			m.rope(k, p)
			copy(s.v[li][p*kvDim:(p+1)*kvDim], ws.vb[r*kvDim:(r+1)*kvDim])
		}
		// Attention: each row attends over its own sequence's positions
		// 0..pos, which all rows of this call have written above. Rows
		// are independent, so big batches spread them over cores.
		attendRows := func(lo, hi int, scores []float32) {
			for r := lo; r < hi; r++ {
				s, p := seqs[r], ws.pos[r]
				if cap(scores) < p+1 {
					scores = make([]float32, p+1)
				}
				for h := 0; h < c.Heads; h++ {
					q := ws.q[r*dim+h*hd : r*dim+(h+1)*hd]
					o := ws.att[r*dim+h*hd : r*dim+(h+1)*hd]
					attend(o, q, s.k[li], s.v[li], (h/group)*hd, kvDim, p, scale, scores[:p+1])
				}
			}
		}
		if workers := min(runtime.GOMAXPROCS(0), n/parallelRows); workers > 1 {
			var wg sync.WaitGroup
			per := (n + workers - 1) / workers
			for lo := 0; lo < n; lo += per {
				wg.Add(1)
				go func(lo, hi int) {
					defer wg.Done()
					attendRows(lo, hi, nil)
				}(lo, min(n, lo+per))
			}
			wg.Wait()
		} else {
			ws.scores = grow(ws.scores, slices.Max(ws.pos)+1)
			attendRows(0, n, ws.scores)
		}
		matmulT(ws.xb, ws.att, l.wo, n, dim, dim)
		for i := range ws.x {
			ws.x[i] += ws.xb[i]
		}
		for r := 0; r < n; r++ {
			rmsnorm(ws.xb[r*dim:(r+1)*dim], ws.x[r*dim:(r+1)*dim], l.ffnNorm, c.NormEps)
		}
		matmulT(ws.hb, ws.xb, l.gate, n, dim, c.HiddenDim)
		matmulT(ws.hb2, ws.xb, l.up, n, dim, c.HiddenDim)
		for i, g := range ws.hb {
			ws.hb[i] = g / (1 + expf(-g)) * ws.hb2[i] // SiLU(gate)·up
		}
		matmulT(ws.xb, ws.hb, l.down, n, c.HiddenDim, dim)
		for i := range ws.x {
			ws.x[i] += ws.xb[i]
		}
	}
	for r, s := range seqs {
		p := ws.pos[r]
		out := s.hidden[p*dim : (p+1)*dim]
		rmsnorm(out, ws.x[r*dim:(r+1)*dim], m.outNorm, c.NormEps)
		copy(ws.xb[r*dim:(r+1)*dim], out)
	}
	hidden := Matrix{Rows: n, Cols: dim, Data: ws.xb[:n*dim]}
	logits := Matrix{Rows: len(logitRows), Cols: c.VocabSize, Data: make([]float32, len(logitRows)*c.VocabSize)}
	m.head(logits.Data, hidden, logitRows)
	return hidden, logits, nil
}

// head computes logits for the given rows of hidden (contiguous rows go
// through matmulT together).
func (m *Model) head(out []float32, hidden Matrix, rows []int) {
	dim, v := m.cfg.Dim, m.cfg.VocabSize
	for i := 0; i < len(rows); {
		j := i + 1
		for j < len(rows) && rows[j] == rows[j-1]+1 {
			j++
		}
		matmulT(out[i*v:j*v], hidden.Data[rows[i]*dim:(rows[j-1]+1)*dim], m.output, j-i, dim, v)
		i = j
	}
}

// rmsnorm writes x / sqrt(mean(x²) + eps) · w to out.
func rmsnorm(out, x, w []float32, eps float32) {
	var ss float32
	for _, v := range x {
		ss += v * v
	}
	inv := float32(1 / math.Sqrt(float64(ss/float32(len(x))+eps)))
	for i, v := range x {
		out[i] = w[i] * (v * inv)
	}
}

// rope rotates adjacent pairs (x[2i], x[2i+1]) of every head in x by
// position × 10000^(−2i/headDim) (the llama2.c / ggml "normal" RoPE).
func (m *Model) rope(x []float32, pos int) {
	hd := m.cfg.HeadDim
	half := hd / 2
	cs := m.ropeCos[pos*half : (pos+1)*half]
	sn := m.ropeSin[pos*half : (pos+1)*half]
	for h := 0; h < len(x); h += hd {
		for i := 0; i < half; i++ {
			a, b := x[h+2*i], x[h+2*i+1]
			x[h+2*i] = a*cs[i] - b*sn[i]
			x[h+2*i+1] = a*sn[i] + b*cs[i]
		}
	}
}

// Output is the result of Forward for a token sequence.
type Output struct {
	// Hidden has one row per input token: the last hidden state after the
	// final RMSNorm (EmbeddingSize columns).
	Hidden Matrix
	// Logits has one row per input token: the next-token logits
	// (VocabSize columns), Logits.Row(i) = OutputHead · Hidden.Row(i).
	Logits Matrix
}

// Forward runs the model over tokens (which should start with BOS; it is
// not added) as one batch and returns the hidden state and logits at every
// position. Results are bit-for-bit deterministic. It is safe to call
// concurrently; it returns ctx's error if ctx ends, ErrBadToken for an id
// outside the vocabulary and ErrContextFull for too long a sequence.
func (m *Model) Forward(ctx context.Context, tokens []int) (Output, error) {
	if len(tokens) == 0 {
		return Output{}, nil
	}
	seq := m.newSequence()
	seqs := make([]*sequence, len(tokens))
	rows := make([]int, len(tokens))
	for i := range seqs {
		seqs[i] = seq
		rows[i] = i
	}
	var ws workspace
	hidden, logits, err := m.forward(ctx, &ws, seqs, tokens, rows)
	if err != nil {
		return Output{}, err
	}
	hidden.Data = append([]float32(nil), hidden.Data...)
	return Output{Hidden: hidden, Logits: logits}, nil
}

// attend writes to o the attention of query q over positions 0..len(sc)-1
// of one KV head (columns off…off+len(q) of each kvDim-wide cache row):
// softmax(q·kₜ·scale) weighted sum of vₜ. sc is scratch.
func attend(o, q, kc, vc []float32, off, kvDim, p int, scale float32, sc []float32) {
	hd := len(q)
	maxS := float32(math.Inf(-1))
	for t := range sc {
		v := dot(q, kc[t*kvDim+off:t*kvDim+off+hd]) * scale
		sc[t] = v
		maxS = max(maxS, v)
	}
	var sum float32
	for t, v := range sc {
		e := expf(v - maxS)
		sc[t] = e
		sum += e
	}
	inv := 1 / sum
	clear(o)
	for t, a := range sc {
		a *= inv
		vt := vc[t*kvDim+off : t*kvDim+off+hd]
		vt = vt[:len(o)]
		for i := range o {
			o[i] += a * vt[i]
		}
	}
}
