package policy_test

import (
	"bytes"
	"context"
	"fmt"
	"math"
	"slices"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/policy"
)

// realModel loads the real model file; it fails, never skips, when the
// file is missing.
func realModel(tb testing.TB) *localmodel.Model {
	tb.Helper()
	m, err := localmodel.Load(modeltest.Path(tb))
	require.NoError(tb, err, "load model")
	return m
}

// TestLocal checks the adapter against the model's own Forward (whose
// rows are bit-for-bit independent of batch size, per the localmodel
// package doc), the prefix caching, and a short training run on the real
// backbone.
func TestLocal(t *testing.T) {
	ctx := context.Background()
	m := realModel(t)
	bos := m.Tokenizer().BOS()
	l, err := policy.NewLocal(m, policy.LocalOptions{})
	require.NoError(t, err)
	prompt := m.Tokenizer().Encode("Once upon a time")
	h, err := l.Hidden(ctx, prompt)
	require.NoError(t, err)
	// Every prefix (the empty one included) was cached by that one pass.
	assert.Equal(t, len(prompt)+1, l.CacheLen(), "prompts in the cache")
	for i := 0; i <= len(prompt); i++ {
		out, err := m.Forward(ctx, append([]int{bos}, prompt[:i]...))
		require.NoError(t, err)
		want := out.Hidden.Row(i)
		got, err := l.Hidden(ctx, prompt[:i])
		require.NoError(t, err)
		assert.Truef(t, slices.Equal(got, want), "prefix of %d tokens: hidden state differs from Forward(BOS+prefix)", i)
		assert.False(t, i == len(prompt) && !slices.Equal(h, want), "first Hidden call differs from Forward")
	}
	rows, cols, _ := l.OutputHead()
	assert.Falsef(t, rows != m.VocabSize() || cols != m.EmbeddingSize(), "head %d×%d, want %d×%d", rows, cols, m.VocabSize(), m.EmbeddingSize())

	// Off: nothing cached, same values.
	off, err := policy.NewLocal(m, policy.LocalOptions{Start: []int{bos}, CacheEntries: -1})
	require.NoError(t, err)
	got, _ := off.Hidden(ctx, prompt)
	assert.Falsef(t, !slices.Equal(got, h) || off.CacheLen() != 0, "uncached adapter: equal %v, cache %d", slices.Equal(got, h), off.CacheLen())

	// A short run over the whole 512-token vocabulary: the policy starts
	// near uniform, losses are finite and the checkpoint round-trips.
	tr := newTrainer(t, l, policy.Config{PromptLength: 3, Hidden: 32, LearningRate: 1e-2, Seed: 1})
	q, err := tr.QValues(ctx, nil)
	require.NoError(t, err)
	spread := slices.Max(q) - slices.Min(q)
	assert.Falsef(t, len(q) != 512 || spread > 0.1, "initial Q: %d values spread over %.3g, want 512 within 0.1", len(q), spread)
	reward := func(p []int) float64 { return float64(len(m.Tokenizer().Decode(p))) / 4 }
	for range 3 {
		prompts, err := tr.Sample(ctx, 4)
		require.NoError(t, err)
		rs := make([]float64, len(prompts))
		for i, p := range prompts {
			rs[i] = reward(p)
		}
		st, err := tr.Update(ctx, prompts, rs)
		require.NoError(t, err)
		require.Falsef(t, math.IsNaN(st.Loss) || math.IsInf(st.Loss, 0), "loss %v", st.Loss)
	}
	var buf bytes.Buffer
	require.NoError(t, tr.Save(&buf))
	r, err := policy.Load(bytes.NewReader(buf.Bytes()), off)
	require.NoError(t, err)
	g1, _ := tr.Greedy(ctx)
	g2, err := r.Greedy(ctx)
	assert.Falsef(t, err != nil || !slices.Equal(g1, g2) || len(g1) != 3, "greedy %v, restored %v (%v)", g1, g2, err)
}

func TestNewLocalErrors(t *testing.T) {
	m := realModel(t)
	for _, opts := range []policy.LocalOptions{
		{Start: []int{}},
		{Start: []int{1, 512}},
		{CacheEntries: -2},
	} {
		_, err := policy.NewLocal(m, opts)
		assert.ErrorIs(t, err, policy.ErrConfig, "%+v: got %v, want ErrConfig", opts, err)
	}
	l, err := policy.NewLocal(m, policy.LocalOptions{})
	require.NoError(t, err)
	_, err = l.Hidden(context.Background(), []int{600})
	assert.ErrorIs(t, err, localmodel.ErrBadToken, "Hidden(600): got %v, want ErrBadToken", err)
}

// TestLocalConcurrent: concurrent callers sharing prefixes get the same
// states as one caller (run under -race to check the cache's locking).
func TestLocalConcurrent(t *testing.T) {
	ctx := context.Background()
	m := realModel(t)
	l, err := policy.NewLocal(m, policy.LocalOptions{CacheEntries: 8})
	require.NoError(t, err)
	ref, err := policy.NewLocal(m, policy.LocalOptions{CacheEntries: -1})
	require.NoError(t, err)
	prompts := [][]int{{300, 301, 302}, {300, 301}, {300, 400}, {}, {511, 3, 4, 5}}
	var wg sync.WaitGroup
	errs := make(chan error, 4*len(prompts))
	for g := range 4 {
		wg.Go(func() {
			for i := range prompts {
				p := prompts[(i+g)%len(prompts)]
				got, err := l.Hidden(ctx, p)
				if err != nil {
					errs <- err
					return
				}
				want, _ := ref.Hidden(ctx, p)
				if !slices.Equal(got, want) {
					errs <- fmt.Errorf("prompt %v: cached state differs", p)
				}
			}
		})
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		assert.NoError(t, err)
	}
	n := l.CacheLen()
	assert.Falsef(t, n > 8, "cache holds %d entries, bound 8", n)
}
