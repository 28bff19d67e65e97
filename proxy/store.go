package proxy

import (
	"context"
	"errors"

	"github.com/stintlab/stint/cache"
)

// storeItems records each fetched prompt's answer under its key. The writes
// land behind the answer (see writeBehind), or before storeItems returns
// when sync is set. It reports whether every answer was stored (or queued
// to be).
func (p *Proxy) storeItems(ctx context.Context, ll *logLine, req *request, items []item, misses []int, got []served, greedy, sync bool) bool {
	stored := true
	for j, i := range misses {
		key := items[i].key
		var rec record
		b := items[i].stored
		if !items[i].looked {
			b, _, _ = p.writes.get(ctx, key)
		}
		if b != nil {
			if old, err := decodeRecord(b); err == nil {
				rec = old
			}
		}
		v := variant{
			Logprobs:  req.logprobs,
			MaxTokens: req.maxTokens,
			Usage:     got[j].usage,
			Estimated: len(misses) > 1,
			StoredAt:  nowUnix(p.now()),
			Body:      got[j].body,
		}
		if f := got[j].facts; f != nil {
			v.Finish, v.Tokens = f.finish, f.tokens
		} else {
			v.Finish, v.Tokens = tokenFacts(req, got[j].body)
		}
		b, err := rec.with(v, greedy, req.stop).encode()
		if err != nil {
			p.metrics.storeErrors.WithLabelValues("encode").Inc()
			stored = false
			continue
		}
		if sync {
			if err := p.store.Put(ctx, key, b, p.ttl); err != nil {
				stored = false
				if !errors.Is(err, cache.ErrTooLarge) {
					p.storeFailed(ll, "put", err)
				}
			}
			continue
		}
		p.writes.put(key, b, p.ttl, func(err error) {
			p.metrics.storeErrors.WithLabelValues("put").Inc()
			p.log.Warn("cache put failed; answer served but not stored", "err", err)
		})
	}
	return stored
}
