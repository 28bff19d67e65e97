package localmodel

import "sync"

// prefixCache keeps the KV caches of recent prompts so a later prompt that
// shares a token prefix with one of them copies those positions instead of
// recomputing them. Keys and values at position p depend only on tokens
// 0..p, so any common prefix of any cached entry is reusable exactly.
//
// Entries are immutable once added; eviction is least recently used, by
// total cached positions. It is safe for concurrent use.
type prefixCache struct {
	max int // positions kept at most

	mu sync.Mutex // guards entries and size
	// entries are ordered from least to most recently used.
	entries []*sequence
	size    int
}

func newPrefixCache(maxPositions int) *prefixCache {
	return &prefixCache{max: maxPositions}
}

// longest returns the cached sequence sharing the longest token prefix with
// tokens, and that prefix's length (0 and nil when none shares any).
func (c *prefixCache) longest(tokens []int) (*sequence, int) {
	if c == nil {
		return nil, 0
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	best, bestN := -1, 0
	for i, e := range c.entries {
		n := commonPrefix(e.tokens, tokens)
		if n > bestN {
			best, bestN = i, n
		}
	}
	if best < 0 {
		return nil, 0
	}
	e := c.entries[best]
	c.entries = append(append(c.entries[:best:best], c.entries[best+1:]...), e)
	return e, bestN
}

// add stores s (which the caller must not modify afterwards) unless an
// entry already covers it; entries that s extends are dropped.
func (c *prefixCache) add(s *sequence) {
	if c == nil || len(s.tokens) == 0 || len(s.tokens) > c.max {
		return
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	for _, e := range c.entries {
		if commonPrefix(e.tokens, s.tokens) == len(s.tokens) {
			return // an entry already covers s
		}
	}
	kept := c.entries[:0]
	for _, e := range c.entries {
		if commonPrefix(e.tokens, s.tokens) == len(e.tokens) {
			c.size -= len(e.tokens) // s extends e
			continue
		}
		kept = append(kept, e)
	}
	clear(c.entries[len(kept):])
	c.entries = append(kept, s)
	c.size += len(s.tokens)
	for c.size > c.max {
		c.size -= len(c.entries[0].tokens)
		c.entries[0] = nil
		c.entries = c.entries[1:]
	}
}

func commonPrefix(a, b []int) int {
	n := min(len(a), len(b))
	for i := 0; i < n; i++ {
		if a[i] != b[i] {
			return i
		}
	}
	return n
}
