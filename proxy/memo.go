package proxy

import (
	"crypto/sha256"

	"github.com/maypok86/otter/v2"
)

// memoEntries bounds the request memo.
const memoEntries = 1 << 16

// requestMemo remembers, for request bodies seen before byte for byte, what
// decoding and canonicalizing them produced: tuning loops resend identical
// bytes, so a repeat skips straight to the cache lookup. The memo is a pure
// function of (team, endpoint, body), so an entry never goes stale.
type requestMemo struct {
	c *otter.Cache[[sha256.Size]byte, *memoEntry]
}

// memoEntry is a decoded single-prompt request without its body fields, and
// its cache key.
type memoEntry struct {
	req request
	key string
}

func newRequestMemo() *requestMemo {
	return &requestMemo{c: otter.Must(&otter.Options[[sha256.Size]byte, *memoEntry]{MaximumSize: memoEntries})}
}

func memoKey(t *Team, ep endpoint, body []byte) [sha256.Size]byte {
	h := sha256.New()
	h.Write([]byte(t.Name))
	h.Write([]byte{0})
	h.Write([]byte(ep))
	h.Write([]byte{0})
	h.Write(body)
	var k [sha256.Size]byte
	h.Sum(k[:0])
	return k
}

func (m *requestMemo) get(k [sha256.Size]byte) (*memoEntry, bool) { return m.c.GetIfPresent(k) }

// remember stores req's facts (not its fields) under k.
func (m *requestMemo) remember(k [sha256.Size]byte, req *request, key string) {
	e := &memoEntry{req: *req, key: key}
	e.req.raw, e.req.fields, e.req.prompts = nil, nil, nil
	m.c.Set(k, e)
}
