package policy_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"sync"
	"testing"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/policy"
)

// realModel loads the real model file; it fails, never skips, when the
// file is missing.
func realModel(tb testing.TB) *localmodel.Model {
	tb.Helper()
	m, err := localmodel.Load(modeltest.Path(tb))
	if err != nil {
		tb.Fatalf("load model: %v", err)
	}
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
	if err != nil {
		t.Fatal(err)
	}
	prompt := m.Tokenizer().Encode("Once upon a time")
	h, err := l.Hidden(ctx, prompt)
	if err != nil {
		t.Fatal(err)
	}
	// Every prefix (the empty one included) was cached by that one pass.
	if got := l.CacheLen(); got != len(prompt)+1 {
		t.Errorf("cache holds %d prompts, want %d", got, len(prompt)+1)
	}
	for i := 0; i <= len(prompt); i++ {
		out, err := m.Forward(ctx, append([]int{bos}, prompt[:i]...))
		if err != nil {
			t.Fatal(err)
		}
		want := out.Hidden.Row(i)
		got, err := l.Hidden(ctx, prompt[:i])
		if err != nil {
			t.Fatal(err)
		}
		if !slices.Equal(got, want) {
			t.Errorf("prefix of %d tokens: hidden state differs from Forward(BOS+prefix)", i)
		}
		if i == len(prompt) && !slices.Equal(h, want) {
			t.Errorf("first Hidden call differs from Forward")
		}
	}
	rows, cols, _ := l.OutputHead()
	if rows != m.VocabSize() || cols != m.EmbeddingSize() {
		t.Errorf("head %d×%d, want %d×%d", rows, cols, m.VocabSize(), m.EmbeddingSize())
	}

	// Off: nothing cached, same values.
	off, err := policy.NewLocal(m, policy.LocalOptions{Start: []int{bos}, CacheEntries: -1})
	if err != nil {
		t.Fatal(err)
	}
	if got, _ := off.Hidden(ctx, prompt); !slices.Equal(got, h) || off.CacheLen() != 0 {
		t.Errorf("uncached adapter: equal %v, cache %d", slices.Equal(got, h), off.CacheLen())
	}

	// A short run over the whole 512-token vocabulary: the policy starts
	// near uniform, losses are finite and the checkpoint round-trips.
	tr := newTrainer(t, l, policy.Config{PromptLength: 3, Hidden: 32, LearningRate: 1e-2, Seed: 1})
	q, err := tr.QValues(ctx, nil)
	if err != nil {
		t.Fatal(err)
	}
	if spread := slices.Max(q) - slices.Min(q); len(q) != 512 || spread > 0.1 {
		t.Errorf("initial Q: %d values spread over %.3g, want 512 within 0.1", len(q), spread)
	}
	reward := func(p []int) float64 { return float64(len(m.Tokenizer().Decode(p))) / 4 }
	for range 3 {
		prompts, err := tr.Sample(ctx, 4)
		if err != nil {
			t.Fatal(err)
		}
		rs := make([]float64, len(prompts))
		for i, p := range prompts {
			rs[i] = reward(p)
		}
		st, err := tr.Update(ctx, prompts, rs)
		if err != nil {
			t.Fatal(err)
		}
		if math.IsNaN(st.Loss) || math.IsInf(st.Loss, 0) {
			t.Fatalf("loss %v", st.Loss)
		}
	}
	var buf bytes.Buffer
	if err := tr.Save(&buf); err != nil {
		t.Fatal(err)
	}
	r, err := policy.Load(bytes.NewReader(buf.Bytes()), off)
	if err != nil {
		t.Fatal(err)
	}
	g1, _ := tr.Greedy(ctx)
	g2, err := r.Greedy(ctx)
	if err != nil || !slices.Equal(g1, g2) || len(g1) != 3 {
		t.Errorf("greedy %v, restored %v (%v)", g1, g2, err)
	}
}

func TestNewLocalErrors(t *testing.T) {
	m := realModel(t)
	for _, opts := range []policy.LocalOptions{
		{Start: []int{}},
		{Start: []int{1, 512}},
		{CacheEntries: -2},
	} {
		if _, err := policy.NewLocal(m, opts); !errors.Is(err, policy.ErrConfig) {
			t.Errorf("%+v: got %v, want ErrConfig", opts, err)
		}
	}
	l, err := policy.NewLocal(m, policy.LocalOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := l.Hidden(context.Background(), []int{600}); !errors.Is(err, localmodel.ErrBadToken) {
		t.Errorf("Hidden(600): got %v, want ErrBadToken", err)
	}
}

// TestLocalConcurrent: concurrent callers sharing prefixes get the same
// states as one caller (run under -race to check the cache's locking).
func TestLocalConcurrent(t *testing.T) {
	ctx := context.Background()
	m := realModel(t)
	l, err := policy.NewLocal(m, policy.LocalOptions{CacheEntries: 8})
	if err != nil {
		t.Fatal(err)
	}
	ref, err := policy.NewLocal(m, policy.LocalOptions{CacheEntries: -1})
	if err != nil {
		t.Fatal(err)
	}
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
		t.Error(err)
	}
	if n := l.CacheLen(); n > 8 {
		t.Errorf("cache holds %d entries, bound 8", n)
	}
}
