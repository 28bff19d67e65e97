package policy

import (
	"context"
	"fmt"

	"github.com/stintlab/stint/proxy/localmodel"
)

// DefaultLocalCacheEntries is the hidden-state cache size when
// LocalOptions.CacheEntries is 0.
const DefaultLocalCacheEntries = 1 << 16

// LocalOptions configures NewLocal. The zero value of every field selects
// its default.
type LocalOptions struct {
	// Start is the context every prompt follows (token ids); nil means the
	// model's BOS token alone. It must not be empty.
	Start []int
	// CacheEntries bounds how many prompts' hidden states are kept (least
	// recently used go first); 0 means 65536, −1 turns the cache off.
	CacheEntries int
}

// Local is a Backbone running a *localmodel.Model in process. One model
// pass over Start+prompt yields the hidden state of every prefix of the
// prompt, and all of them are cached, so sampling a prompt token by token
// and then training on it costs one pass per new prefix. It is safe for
// concurrent use.
type Local struct {
	m     *localmodel.Model
	start []int
	cache *hiddenCache // nil when off
}

var _ Backbone = (*Local)(nil)

// NewLocal returns a Backbone over m.
func NewLocal(m *localmodel.Model, opts LocalOptions) (*Local, error) {
	start := opts.Start
	if start == nil {
		start = []int{m.Tokenizer().BOS()}
	}
	if len(start) == 0 {
		return nil, fmt.Errorf("%w: LocalOptions.Start is empty", ErrConfig)
	}
	for i, id := range start {
		if id < 0 || id >= m.VocabSize() {
			return nil, fmt.Errorf("%w: LocalOptions.Start[%d] = %d is outside the vocabulary", ErrConfig, i, id)
		}
	}
	l := &Local{m: m, start: append([]int(nil), start...)}
	switch n := opts.CacheEntries; {
	case n == 0:
		l.cache = newHiddenCache(DefaultLocalCacheEntries)
	case n > 0:
		l.cache = newHiddenCache(n)
	case n != -1:
		return nil, fmt.Errorf("%w: LocalOptions.CacheEntries %d is neither ≥ 0 nor -1", ErrConfig, n)
	}
	return l, nil
}

// Hidden returns the model's final hidden state after Start followed by
// prompt.
func (l *Local) Hidden(ctx context.Context, prompt []int) ([]float32, error) {
	key := promptKey(prompt)
	if l.cache != nil {
		if h, ok := l.cache.get(key); ok {
			return h, nil
		}
	}
	tokens := append(append(make([]int, 0, len(l.start)+len(prompt)), l.start...), prompt...)
	out, err := l.m.Forward(ctx, tokens)
	if err != nil {
		return nil, fmt.Errorf("policy: local model: %w", err)
	}
	last := len(tokens) - 1
	if l.cache != nil {
		for i := range len(prompt) {
			l.cache.put(promptKey(prompt[:i]), out.Hidden.Row(len(l.start)-1+i))
		}
		l.cache.put(key, out.Hidden.Row(last))
	}
	return out.Hidden.Row(last), nil
}

// OutputHead returns the model's output head (vocabulary × hidden size).
func (l *Local) OutputHead() (rows, cols int, data []float32) {
	h := l.m.OutputHead()
	return h.Rows, h.Cols, h.Data
}

// CacheLen returns the number of prompts whose hidden states are cached.
func (l *Local) CacheLen() int {
	if l.cache == nil {
		return 0
	}
	return l.cache.len()
}
