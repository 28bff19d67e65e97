package localmodel

import (
	"context"
	"math"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/gguf"
)

// TestConfig checks the shape recorded in MODEL-SOURCE.md ("Format").
func TestConfig(t *testing.T) {
	got := loadModel(t).Config()
	want := Config{Dim: 64, HiddenDim: 172, Layers: 5, Heads: 8, KVHeads: 4, HeadDim: 8, VocabSize: 512,
		ContextLength: 2048, RopeBase: 10000, NormEps: float32(1e-5)}
	assert.True(t, got == want, "got %+v, want %+v", got, want)
}

func TestLoadErrors(t *testing.T) {
	dir := t.TempDir()
	write := func(name string, meta []gguf.KeyValue) string {
		b, err := gguf.Encode(meta, []gguf.F32Tensor{{Name: "x", Dims: []uint64{1}, Data: []float32{0}}})
		require.NoError(t, err)
		p := filepath.Join(dir, name)
		require.NoError(t, os.WriteFile(p, b, 0o644))
		return p
	}
	str := func(s string) gguf.Value { return gguf.Value{Type: gguf.TypeString, V: s} }
	u32 := func(v uint32) gguf.Value { return gguf.Value{Type: gguf.TypeUint32, V: v} }
	llama := []gguf.KeyValue{
		{Key: "general.architecture", Value: str("llama")},
		{Key: "llama.embedding_length", Value: u32(8)},
		{Key: "llama.feed_forward_length", Value: u32(8)},
		{Key: "llama.block_count", Value: u32(1)},
		{Key: "llama.attention.head_count", Value: u32(3)}, // 8 % 3 != 0
		{Key: "llama.context_length", Value: u32(16)},
		{Key: "llama.attention.layer_norm_rms_epsilon", Value: gguf.Value{Type: gguf.TypeFloat32, V: float32(1e-5)}},
	}
	tests := []struct {
		name string
		path string
		want error
	}{
		{"missing file", filepath.Join(dir, "nope.gguf"), os.ErrNotExist},
		{"not gguf", func() string {
			p := filepath.Join(dir, "text")
			_ = os.WriteFile(p, []byte("hello, world"), 0o644)
			return p
		}(), gguf.ErrBadMagic},
		{"other architecture", write("gpt2.gguf", []gguf.KeyValue{{Key: "general.architecture", Value: str("gpt2")}}), ErrUnsupportedModel},
		{"no architecture", write("none.gguf", nil), gguf.ErrNotFound},
		{"bad head count", write("heads.gguf", llama), ErrUnsupportedModel},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Load(tc.path)
			assert.ErrorIs(t, err, tc.want, "got %v, want %v", err, tc.want)
		})
	}
}

// TestBatchedEqualsTokenByToken: prompt processing as one batch gives
// bit-for-bit the same logits and hidden states as one token at a time.
// 300 positions take the parallel paths (row tiles and attention rows on
// several goroutines) in the batch and the serial ones token by token.
func TestBatchedEqualsTokenByToken(t *testing.T) {
	m := loadModel(t)
	toks := benchPrompt(m, 300)
	batch, err := m.Forward(context.Background(), toks)
	require.NoError(t, err)
	seq := m.newSequence()
	var ws workspace
	for i, tok := range toks {
		hidden, logits, err := m.forward(context.Background(), &ws, []*sequence{seq}, []int{tok}, []int{0})
		require.NoError(t, err)
		require.True(t, sameBits(logits.Row(0), batch.Logits.Row(i)), "position %d: token-by-token result differs from batched", i)
		require.True(t, sameBits(hidden.Row(0), batch.Hidden.Row(i)), "position %d: token-by-token result differs from batched", i)
	}
}

func sameBits(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
			return false
		}
	}
	return true
}

// TestForwardOutputs: logits = OutputHead · Hidden, and Hidden is RMS-normed
// (its root mean square over the norm weights is ~1).
func TestForwardOutputs(t *testing.T) {
	m := loadModel(t)
	out, err := m.Forward(context.Background(), []int{m.tok.BOS(), 300, 400})
	require.NoError(t, err)
	head := m.OutputHead()
	require.Equal(t, m.VocabSize(), head.Rows, "shapes: head %dx%d hidden %dx%d logits %dx%d", head.Rows, head.Cols, out.Hidden.Rows, out.Hidden.Cols, out.Logits.Rows, out.Logits.Cols)
	require.Equal(t, m.EmbeddingSize(), head.Cols, "shapes: head %dx%d hidden %dx%d logits %dx%d", head.Rows, head.Cols, out.Hidden.Rows, out.Hidden.Cols, out.Logits.Rows, out.Logits.Cols)
	require.Equal(t, m.EmbeddingSize(), out.Hidden.Cols, "shapes: head %dx%d hidden %dx%d logits %dx%d", head.Rows, head.Cols, out.Hidden.Rows, out.Hidden.Cols, out.Logits.Rows, out.Logits.Cols)
	require.Equal(t, m.VocabSize(), out.Logits.Cols, "shapes: head %dx%d hidden %dx%d logits %dx%d", head.Rows, head.Cols, out.Hidden.Rows, out.Hidden.Cols, out.Logits.Rows, out.Logits.Cols)
	for i := 0; i < out.Hidden.Rows; i++ {
		for v := 0; v < head.Rows; v += 37 {
			var s float64
			for d, h := range out.Hidden.Row(i) {
				s += float64(h) * float64(head.Row(v)[d])
			}
			got := float64(out.Logits.Row(i)[v])
			assert.False(t, math.Abs(got-s) > 1e-4, "row %d vocab %d: logit %v, head·hidden %v", i, v, got, s)
		}
	}
	_, err = m.Forward(context.Background(), []int{1, 512})
	assert.ErrorIs(t, err, ErrBadToken, "token 512: got %v, want ErrBadToken", err)
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	_, err = m.Forward(ctx, []int{1, 2})
	assert.ErrorIs(t, err, context.Canceled, "cancelled: got %v, want context.Canceled", err)
	long := make([]int, m.Config().ContextLength+1)
	_, err = m.Forward(context.Background(), long)
	assert.ErrorIs(t, err, ErrContextFull, "too long: got %v, want ErrContextFull", err)
}

// TestPrefixCacheExact: a prompt served with a cached prefix gives the same
// bits as computing it from scratch, and the cache was really used.
func TestPrefixCacheExact(t *testing.T) {
	m := loadModel(t)
	cached := &engine{m: m, cache: newPrefixCache(1 << 12)}
	plain := &engine{m: m}
	shared := "Lily and her mom went to the store to buy a new red ball. "
	var ws workspace
	for i, suffix := range []string{"Tim said", "The ball was", "Tim said"} {
		toks := append([]int{1}, m.tok.Encode(shared+suffix)...)
		a, la, err := cached.prefill(context.Background(), &ws, toks, true, 3)
		require.NoError(t, err)
		b, lb, err := plain.prefill(context.Background(), &ws, toks, true, 3)
		require.NoError(t, err)
		require.True(t, sameBits(la, lb), "request %d: cached and uncached results differ", i)
		require.True(t, sameBits(a.seq.hidden, b.seq.hidden), "request %d: cached and uncached results differ", i)
		for l := range a.seq.k {
			require.True(t, sameBits(a.seq.k[l], b.seq.k[l]), "request %d layer %d: KV differs", i, l)
			require.True(t, sameBits(a.seq.v[l], b.seq.v[l]), "request %d layer %d: KV differs", i, l)
		}
		for j := range a.lps {
			require.Equal(t, b.lps[j].lp, a.lps[j].lp, "request %d: prompt logprob %d differs", i, j)
		}
		want := map[int]int{0: 0, 1: len(m.tok.Encode(shared)), 2: len(toks)}[i]
		if i == 1 {
			assert.GreaterOrEqual(t, a.reused, want-1, "request 1: reused %d positions, want about the %d-token shared prefix", a.reused, want)
			assert.Less(t, a.reused, len(toks), "request 1: reused %d positions, want about the %d-token shared prefix", a.reused, want)
		}
		assert.False(t, i != 1 && a.reused != want, "request %d: reused %d positions, want %d", i, a.reused, want)
	}
}

func TestPrefixCacheEviction(t *testing.T) {
	m := loadModel(t)
	c := newPrefixCache(10)
	mk := func(toks ...int) *sequence { s := m.newSequence(); s.tokens = toks; return s }
	c.add(mk(1, 2, 3, 4))
	c.add(mk(1, 2, 3, 4, 5, 6)) // extends and replaces the first
	require.Len(t, c.entries, 1, "after extend: %d entries, size %d; want 1, 6", len(c.entries), c.size)
	require.Equal(t, 6, c.size, "after extend: %d entries, size %d; want 1, 6", len(c.entries), c.size)
	c.add(mk(1, 2)) // covered
	require.Len(t, c.entries, 1, "covered prefix was added")
	c.add(mk(7, 8, 9, 10, 11)) // evicts the oldest
	_, n := c.longest([]int{1, 2, 3})
	assert.Equal(t, 0, n, "after eviction: prefix %d, want 0", n)
	assert.Equal(t, 5, c.size, "after eviction: size %d, want 5", c.size)
	_, n = c.longest([]int{7, 8, 0})
	assert.Equal(t, 2, n, "longest: got %d, want 2", n)
}

// TestExpf compares expf with math.Exp (float64) across its range.
func TestExpf(t *testing.T) {
	for x := -90.0; x < 90; x += 0.01237 {
		got, want := float64(expf(float32(x))), math.Exp(float64(float32(x)))
		if want < 1.2e-38 || want > 3.4e38 {
			require.False(t, want < 1.2e-38 && got != 0 && math.Abs(got-want) > 1e-38, "expf(%v) = %v, want about %v", x, got, want)
			continue
		}
		rel := math.Abs(got-want) / want
		require.False(t, rel > 4e-7, "expf(%v) = %v, want %v (relative error %.2g)", x, got, want, rel)
	}
	assert.Equal(t, float32(1), expf(0), "special values: %v %v %v", expf(0), expf(-100), expf(100))
	assert.Equal(t, float32(0), expf(-100), "special values: %v %v %v", expf(0), expf(-100), expf(100))
	assert.True(t, math.IsInf(float64(expf(100)), 1), "special values: %v %v %v", expf(0), expf(-100), expf(100))
	assert.True(t, math.IsNaN(float64(expf(float32(math.NaN())))), "special values: %v %v %v", expf(0), expf(-100), expf(100))
}
