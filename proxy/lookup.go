package proxy

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/proxy/wire"
)

// served is one prompt's answer: a complete single-prompt response body.
type served struct {
	body  []byte
	usage wire.Usage
	// facts, when set, are tokenFacts of body, found while decoding it.
	facts *answerFacts
	// storedAt is when a cached answer was stored (Unix seconds).
	storedAt int64
}

// item is one prompt of a request and its cache state.
type item struct {
	prompt json.RawMessage // nil for chat
	key    string
	hit    *served
	// looked: the store was asked for key; stored is the record it held (nil
	// for none), reused when the answer is stored so the store is read once.
	looked bool
	stored []byte
}

// lookup returns the cached answer for key shaped to req (nil when there is
// none that fits) and the stored record's bytes (nil when there is none).
func (p *Proxy) lookup(ctx context.Context, ll *logLine, req *request, key string, greedy bool) (*served, []byte) {
	b, ok, err := p.writes.get(ctx, key)
	if err != nil {
		// A store that failed may still have served a copy it held (see
		// writeBehind.get): the answer is then served, and says the store
		// is unavailable.
		p.storeFailed(ll, "get", err)
	}
	if !ok {
		return nil, nil
	}
	return p.fromRecord(req, b, greedy)
}

// fromRecord is lookup's answer from the stored record b.
func (p *Proxy) fromRecord(req *request, b []byte, greedy bool) (*served, []byte) {
	rec, err := decodeRecord(b)
	if err != nil {
		p.metrics.storeErrors.WithLabelValues("decode").Inc()
		return nil, nil
	}
	v, ok := rec.pick(req.logprobs, req.maxTokens, greedy, req.stop)
	if !ok {
		return nil, b
	}
	body, u, err := shape(req.endpoint, v, req.logprobs, req.maxTokens)
	if err != nil {
		return nil, b
	}
	return &served{body: body, usage: u, storedAt: v.StoredAt}, b
}

// oldestStored is when the oldest of items' cached answers was stored
// (Unix seconds); 0 when none is cached.
func oldestStored(items []item) int64 {
	var at int64
	for _, it := range items {
		if it.hit != nil && (at == 0 || it.hit.storedAt < at) {
			at = it.hit.storedAt
		}
	}
	return at
}

// itemKey derives the cache key of one prompt of req (prompt is nil for chat).
func itemKey(t *Team, up *Upstream, req *request, prompt json.RawMessage) (string, error) {
	canonical, err := keyBody(req, prompt)
	if err != nil {
		return "", err
	}
	return cache.Key(cache.KeyParts{
		Namespace: t.namespace(),
		Upstream:  up.Name,
		Endpoint:  string(req.endpoint),
		Model:     req.model,
	}, canonical), nil
}

// flightKeyFor identifies an upstream call: the missing prompts' keys and the
// fields that shape the answer but are not in the keys.
func flightKeyFor(items []item, misses []int, req *request) string {
	h := sha256.New()
	for _, i := range misses {
		io.WriteString(h, items[i].key)
		h.Write([]byte{0})
	}
	fmt.Fprintf(h, "lp=%d mt=%d", req.logprobs, req.maxTokens)
	return hex.EncodeToString(h.Sum(nil))
}
