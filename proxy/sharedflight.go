package proxy

import "context"

// maxSharedRounds bounds how often one miss waits on another replica's call
// before it makes its own: each round ends when that replica released its
// lease without leaving a fitting answer (its call failed, it died, or it
// fetched another variant of the key).
const maxSharedRounds = 3

// SharedFlights coalesces misses across replicas that share one cache store
// (see Options.SharedFlights); cache/redisstore's Store implements it.
type SharedFlights interface {
	// Claim makes the caller the one fetcher of key among the replicas, or
	// waits while another replica is. It returns a release function when
	// the caller holds key (the caller stores the answer, then releases),
	// and nil when another held it and has since released it or lost it
	// (the caller reads the store again). Errors mean the coordination is
	// unavailable; the caller goes on without it.
	Claim(ctx context.Context, key string) (release func(context.Context) error, err error)
	// Get reads key from the shared store itself, past any in-process tier
	// in front of it that could hold an older answer.
	Get(ctx context.Context, key string) (value []byte, found bool, err error)
}

// claimShared runs before an upstream call for the single missing prompt
// it of req, when misses are coalesced across replicas. It returns either
// an answer another replica fetched and stored (res), or the release of the
// lease this request now holds (the caller fetches, stores synchronously and
// then releases), or neither: the coordination failed or gave up, and the
// caller fetches on its own. it.stored is refreshed from the shared store,
// so the stored record merges what other replicas stored meanwhile.
func (p *Proxy) claimShared(ctx context.Context, ll *logLine, req *request, it *item, greedy bool) (res *flightResult, release func(context.Context) error) {
	for range maxSharedRounds {
		p.remoteWaiting.Add(1)
		rel, err := p.shared.Claim(ctx, it.key)
		p.remoteWaiting.Add(-1)
		if err != nil {
			p.storeFailed(ll, "claim", err)
			return nil, nil
		}
		// The answer may have landed since this request's own lookup: the
		// holder before us stored it and released before we claimed.
		b, ok, err := p.shared.Get(ctx, it.key)
		if err != nil {
			p.storeFailed(ll, "get", err)
			return nil, rel
		}
		var hit *served
		if ok {
			hit, it.stored = p.fromRecord(req, b, greedy)
			it.looked = true
		}
		if hit != nil {
			if rel != nil {
				_ = rel(ctx) // wake the others: the answer is there
			}
			return &flightResult{items: []served{*hit}, fromStore: true}, nil
		}
		if rel != nil {
			return nil, rel
		}
	}
	return nil, nil
}

// storeFailed notes that the cache store failed during the request (Redis
// down or too slow): the request goes on without it, as a miss unless the
// in-process tier held the answer, and its answer says so in Cache-Status
// (DetailStoreUnavailable). The stint_store_degraded_requests_total metric
// counts such requests.
func (p *Proxy) storeFailed(ll *logLine, op string, err error) {
	p.metrics.storeErrors.WithLabelValues(op).Inc()
	p.log.Warn("cache store failed; going on without it", "op", op, "err", err)
	if ll == nil || ll.storeDown {
		return
	}
	ll.storeDown = true
	p.metrics.degraded.Inc()
}
