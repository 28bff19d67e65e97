package scorer

import (
	"net/http"
	"strconv"
	"strings"

	"github.com/dunglas/httpsfv"

	"github.com/stintlab/stint/proxy/wire"
)

// Headers the proxy sets on its answers (see the stint README).
const (
	// HeaderCacheStatus is RFC 9211's Cache-Status: the proxy's member,
	// named cacheName, says how its cache handled the call.
	HeaderCacheStatus   = "Cache-Status"
	HeaderCachedPrompts = "Stint-Cached-Prompts" // "2/3": prompts of a batch answered from the cache
	HeaderCost          = "Stint-Cost-Usd"       // this answer's charge, an estimate
	HeaderRun           = "Stint-Run"            // the run id a call is journaled under
	HeaderRunMode       = "Stint-Run-Mode"       // "replay": answer from the run's journal only
	// HeaderRecordedCost is, on a replayed answer, the call's charge when
	// the run recorded it.
	HeaderRecordedCost = "Stint-Recorded-Cost-Usd"
	// HeaderSaved is what the cache saved on this answer, an estimate.
	HeaderSaved = "Stint-Saved-Usd"
	// HeaderRecordedSaved is, on a replayed answer, what the cache saved
	// when the run recorded it.
	HeaderRecordedSaved = "Stint-Recorded-Saved-Usd"
)

// cacheName identifies the proxy's member of Cache-Status.
const cacheName = "stint"

// The cache outcomes Call.Cache carries, read from the proxy's
// Cache-Status member (RFC 9211 §2.1–§2.8).
const (
	cacheHit     = "hit"     // hit
	cacheMiss    = "miss"    // fwd=miss, or fwd=request (a no-cache refresh)
	cacheShared  = "shared"  // collapsed: answered by an identical call's upstream call
	cachePartial = "partial" // fwd=partial: a batch partly answered from the cache
	cacheBypass  = "bypass"  // fwd=bypass: not cacheable
	cacheReplay  = "replay"  // hit with detail=replay: from a run's journal
)

// Usage is the wire format's token count for one call.
type Usage = wire.Usage

// Call describes one HTTP call a Score made.
type Call struct {
	// Prompts is the number of texts the call scored.
	Prompts int
	// Usage is the answer's usage (zero when it had none).
	Usage Usage
	// Cache is the proxy's cache outcome, from its Cache-Status member:
	// hit, miss, shared, partial, bypass or replay ("" when not behind the
	// proxy).
	Cache string
	// CachedPrompts is how many of Prompts came from the cache: from
	// Stint-Cached-Prompts, else Prompts for a hit and 0 otherwise; −1 when
	// the answer said nothing about the cache.
	CachedPrompts int
	// CostUSD is the Stint-Cost-Usd header, 0 when absent: the proxy's
	// estimate from its price table, not the provider's bill.
	CostUSD float64
	// RecordedCostUSD is, on a replayed answer, the Stint-Recorded-Cost-Usd
	// header: what the call was charged when the run recorded it.
	RecordedCostUSD float64 `json:",omitempty"`
	// SavedUSD is the Stint-Saved-Usd header, 0 when absent: what the
	// cache saved on the call, priced like CostUSD.
	SavedUSD float64 `json:",omitempty"`
	// RecordedSavedUSD is, on a replayed answer, the
	// Stint-Recorded-Saved-Usd header: what the cache saved when the run
	// recorded the call.
	RecordedSavedUSD float64 `json:",omitempty"`
}

// PriceUSD is the call's price before the cache: its charge plus what the
// cache saved (the recording's figures on a replay), so a run and its
// replay agree on it.
func (c Call) PriceUSD() float64 {
	if c.Cache == cacheReplay {
		return c.RecordedCostUSD + c.RecordedSavedUSD
	}
	return c.CostUSD + c.SavedUSD
}

// RunCostUSD is what the call costs the run it belongs to: its charge, or
// on a replay the charge the recording paid. Totals of it agree between a
// run and its replay.
func (c Call) RunCostUSD() float64 {
	if c.Cache == cacheReplay {
		return c.RecordedCostUSD
	}
	return c.CostUSD
}

// readCall fills a Call's cache and cost fields from an answer's headers.
func readCall(h http.Header, prompts int) Call {
	c := Call{Prompts: prompts, Cache: cacheOutcome(h), CachedPrompts: -1}
	switch c.Cache {
	case "":
	case cacheHit:
		c.CachedPrompts = prompts
	default:
		c.CachedPrompts = 0
	}
	if v := h.Get(HeaderCachedPrompts); v != "" {
		if got, _, ok := strings.Cut(v, "/"); ok {
			if n, err := strconv.Atoi(strings.TrimSpace(got)); err == nil && n >= 0 && n <= prompts {
				c.CachedPrompts = n
			}
		}
	}
	c.CostUSD = usdHeader(h, HeaderCost)
	c.SavedUSD = usdHeader(h, HeaderSaved)
	if c.Cache == cacheReplay {
		c.RecordedCostUSD = usdHeader(h, HeaderRecordedCost)
		c.RecordedSavedUSD = usdHeader(h, HeaderRecordedSaved)
	}
	return c
}

// cacheOutcome reads the proxy's member of h's Cache-Status (the last one
// named cacheName: RFC 9211 §2 has the cache nearest the client add its
// member last) as one of the outcome words; "" when there is none.
func cacheOutcome(h http.Header) string {
	list, err := httpsfv.UnmarshalList(h.Values(HeaderCacheStatus))
	if err != nil {
		return ""
	}
	for i := len(list) - 1; i >= 0; i-- {
		it, ok := list[i].(httpsfv.Item)
		if !ok {
			continue
		}
		if name, _ := it.Value.(httpsfv.Token); string(name) != cacheName {
			if s, _ := it.Value.(string); s != cacheName {
				continue
			}
		}
		flag := func(name string) bool { v, _ := it.Params.Get(name); b, _ := v.(bool); return b }
		word := func(name string) string {
			switch v, _ := it.Params.Get(name); x := v.(type) {
			case httpsfv.Token:
				return string(x)
			case string:
				return x
			}
			return ""
		}
		switch fwd := word("fwd"); {
		case flag("hit") && word("detail") == cacheReplay:
			return cacheReplay
		case flag("hit"):
			return cacheHit
		case fwd == "partial":
			return cachePartial
		case flag("collapsed"):
			return cacheShared
		case fwd == "bypass":
			return cacheBypass
		case fwd != "":
			return cacheMiss
		}
		return ""
	}
	return ""
}

// usdHeader reads a non-negative USD amount from header name, 0 when it is
// absent or malformed.
func usdHeader(h http.Header, name string) float64 {
	f, err := strconv.ParseFloat(strings.TrimSpace(h.Get(name)), 64)
	if err != nil || !(f >= 0) {
		return 0
	}
	return f
}

// Totals sums a list of calls.
type Totals struct {
	// Calls and Prompts count the calls and the texts they scored.
	Calls, Prompts int
	// CachedPrompts counts texts answered from the cache (calls that said
	// nothing about the cache count as not cached).
	CachedPrompts int
	// Upstream counts the calls that reached the upstream (a miss, a batch
	// partly answered from the cache, a bypass, or an answer that said
	// nothing about the cache); the others were answered by the proxy
	// alone (a hit, a replay, or an identical call's upstream call).
	Upstream int
	// PriceUSD sums the calls' price before the cache (Call.PriceUSD):
	// what the same calls cost sent straight to the upstream.
	PriceUSD float64
	// Usage sums the calls' usage.
	Usage Usage
	// CostUSD sums the proxy's cost estimates.
	CostUSD float64
	// RunCostUSD sums the calls' RunCostUSD: equal to CostUSD outside a
	// replay, the recording's spend in one.
	RunCostUSD float64
}

// Sum adds up calls.
func Sum(calls []Call) Totals {
	var t Totals
	for _, c := range calls {
		t.Calls++
		t.Prompts += c.Prompts
		t.CachedPrompts += max(c.CachedPrompts, 0)
		if c.ReachedUpstream() {
			t.Upstream++
		}
		t.PriceUSD += c.PriceUSD()
		t.Usage.PromptTokens += c.Usage.PromptTokens
		t.Usage.CompletionTokens += c.Usage.CompletionTokens
		t.Usage.TotalTokens += c.Usage.TotalTokens
		t.CostUSD += c.CostUSD
		t.RunCostUSD += c.RunCostUSD()
	}
	return t
}

// ReachedUpstream says whether the call went to the upstream: not a hit,
// a replay (answered from the run's journal) or a call answered by an
// identical one's upstream call.
func (c Call) ReachedUpstream() bool {
	switch c.Cache {
	case cacheHit, cacheShared, cacheReplay:
		return false
	}
	return true
}

// CallShare is the share of calls answered without an upstream call, 0
// with none: "calls from the cache".
func (t Totals) CallShare() float64 {
	if t.Calls == 0 {
		return 0
	}
	return float64(t.Calls-t.Upstream) / float64(t.Calls)
}

// CacheShare is the share of texts (prompts) answered from the cache, 0
// with none: "texts from the cache".
func (t Totals) CacheShare() float64 {
	if t.Prompts == 0 {
		return 0
	}
	return float64(t.CachedPrompts) / float64(t.Prompts)
}
