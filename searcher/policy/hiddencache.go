package policy

import (
	"container/list"
	"encoding/binary"
	"sync"
)

// hiddenCache maps prompts to hidden states, keeping the max most recently
// used. Stored slices are never modified. It is safe for concurrent use.
type hiddenCache struct {
	max int

	mu sync.Mutex // guards order and byKey
	// order holds *hiddenEntry, most recently used first.
	order *list.List
	byKey map[string]*list.Element
}

type hiddenEntry struct {
	key string
	h   []float32
}

func newHiddenCache(maxEntries int) *hiddenCache {
	return &hiddenCache{max: maxEntries, order: list.New(), byKey: make(map[string]*list.Element)}
}

// promptKey encodes token ids as a map key.
func promptKey(prompt []int) string {
	b := make([]byte, 0, 2*len(prompt))
	for _, id := range prompt {
		b = binary.AppendUvarint(b, uint64(id))
	}
	return string(b)
}

func (c *hiddenCache) get(key string) ([]float32, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	e, ok := c.byKey[key]
	if !ok {
		return nil, false
	}
	c.order.MoveToFront(e)
	return e.Value.(*hiddenEntry).h, true
}

func (c *hiddenCache) put(key string, h []float32) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if e, ok := c.byKey[key]; ok {
		c.order.MoveToFront(e)
		return
	}
	c.byKey[key] = c.order.PushFront(&hiddenEntry{key: key, h: h})
	for c.order.Len() > c.max {
		old := c.order.Remove(c.order.Back()).(*hiddenEntry)
		delete(c.byKey, old.key)
	}
}

// len returns the number of cached prompts.
func (c *hiddenCache) len() int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.order.Len()
}
