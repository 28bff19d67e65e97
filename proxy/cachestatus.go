package proxy

import (
	"net/http"
	"strconv"
	"strings"
	"time"

	"github.com/dunglas/httpsfv"
)

// HeaderCacheStatus is the response header that says how stint's cache
// handled a request: the Cache-Status field of RFC 9211, a Structured
// Field List (RFC 8941 §3.1) to which stint adds one member, identified by
// CacheName, with the RFC's parameters (§2.1–§2.8).
const HeaderCacheStatus = "Cache-Status"

// CacheName identifies stint's member of Cache-Status (RFC 9211 §2).
const CacheName = "stint"

// Values of the fwd parameter (RFC 9211 §2.2) stint sends.
const (
	// FwdBypass: not cacheable (sampled, or caching is off for the team or
	// model), sent upstream as it came.
	FwdBypass = "bypass"
	// FwdMiss: nothing stored fits the request.
	FwdMiss = "miss"
	// FwdRequest: the request's Cache-Control: no-cache asked for a fresh
	// answer, so the cache was not used.
	FwdRequest = "request"
	// FwdPartial: a completions batch with some prompts answered from the
	// cache; only the rest went upstream.
	FwdPartial = "partial"
)

// Values of the detail parameter (RFC 9211 §2.8), for what the RFC has no
// parameter of its own for.
const (
	// DetailReplay: answered from a recorded run's journal (with hit).
	DetailReplay = "replay"
	// DetailStoreUnavailable: the cache store failed during the request;
	// a hit came from the in-process tier, anything else went upstream and
	// may not have been stored.
	DetailStoreUnavailable = "store-unavailable"
)

// CacheStatus is stint's member of a Cache-Status header.
type CacheStatus struct {
	// Hit: answered from the cache without going upstream (§2.1).
	Hit bool
	// Fwd says why the request went upstream (§2.2): FwdBypass, FwdMiss,
	// FwdRequest or FwdPartial; empty when it did not.
	Fwd string
	// FwdStatus is the upstream's status code (§2.3); 0 when unknown.
	FwdStatus int
	// TTL is the answer's remaining freshness (§2.4), whole seconds; only
	// sent when HasTTL (the cache has a ttl configured).
	TTL    time.Duration
	HasTTL bool
	// Stored: the upstream's answer is being kept in the cache (§2.5).
	Stored bool
	// Collapsed: answered by an identical request's upstream call, in this
	// process or on another replica (§2.6).
	Collapsed bool
	// Key is the cache key of a single-prompt request (§2.7).
	Key string
	// Detail is DetailReplay, DetailStoreUnavailable or empty (§2.8).
	Detail string
}

// String serializes c as a one-member Cache-Status list in RFC 8941's
// canonical form (§4.1: parameters as ";key", a true Boolean without a
// value, Integers in decimal, Strings quoted with '"' and '\' escaped).
// It is written by hand rather than with httpsfv.Marshal, which cost the
// hit path 28 allocations per answer (BenchmarkHit: 30 → 58); the tests
// hold its output to httpsfv's parse and serialization.
func (c CacheStatus) String() string {
	b := make([]byte, 0, 48+len(c.Key))
	b = append(b, CacheName...)
	if c.Hit {
		b = append(b, ";hit"...)
	}
	if isToken(c.Fwd) {
		b = append(b, ";fwd="...)
		b = append(b, c.Fwd...)
	}
	if c.FwdStatus > 0 {
		b = append(b, ";fwd-status="...)
		b = strconv.AppendInt(b, int64(c.FwdStatus), 10)
	}
	if c.HasTTL {
		b = append(b, ";ttl="...)
		b = strconv.AppendInt(b, int64(c.TTL/time.Second), 10)
	}
	if c.Stored {
		b = append(b, ";stored"...)
	}
	if c.Collapsed {
		b = append(b, ";collapsed"...)
	}
	if c.Key != "" && isPrintableASCII(c.Key) {
		b = append(b, `;key="`...)
		for i := range len(c.Key) {
			if c.Key[i] == '"' || c.Key[i] == '\\' {
				b = append(b, '\\')
			}
			b = append(b, c.Key[i])
		}
		b = append(b, '"')
	}
	if isToken(c.Detail) {
		b = append(b, ";detail="...)
		b = append(b, c.Detail...)
	}
	return string(b)
}

// isToken reports whether s is an RFC 8941 sf-token (§3.3.4):
// ( ALPHA / "*" ) *( tchar / ":" / "/" ).
func isToken(s string) bool {
	if s == "" || !(s[0] == '*' || s[0] >= 'A' && s[0] <= 'Z' || s[0] >= 'a' && s[0] <= 'z') {
		return false
	}
	for i := 1; i < len(s); i++ {
		ch := s[i]
		if !(ch >= '0' && ch <= '9' || ch >= 'A' && ch <= 'Z' || ch >= 'a' && ch <= 'z' || strings.IndexByte("!#$%&'*+-.^_`|~:/", ch) >= 0) {
			return false
		}
	}
	return true
}

// isPrintableASCII reports whether an sf-string can hold s (RFC 8941
// §3.3.3: %x20-7E).
func isPrintableASCII(s string) bool {
	for i := range len(s) {
		if s[i] < 0x20 || s[i] > 0x7e {
			return false
		}
	}
	return true
}

// Outcome is the cache outcome c reports, in the words of the metrics and
// logs: OutcomeReplay, OutcomeHit, OutcomePartial, OutcomeShared,
// OutcomeBypass or OutcomeMiss; "" for none of them.
func (c CacheStatus) Outcome() string {
	switch {
	case c.Detail == DetailReplay:
		return OutcomeReplay
	case c.Hit:
		return OutcomeHit
	case c.Fwd == FwdPartial:
		return OutcomePartial
	case c.Collapsed:
		return OutcomeShared
	case c.Fwd == FwdBypass:
		return OutcomeBypass
	case c.Fwd == FwdMiss || c.Fwd == FwdRequest:
		return OutcomeMiss
	}
	return ""
}

// ParseCacheStatus reads stint's member from h's Cache-Status fields: the
// last member named CacheName, as the cache nearest the client adds its
// member last (RFC 9211 §2). ok is false when there is none or the field is
// not a valid Structured Field List.
func ParseCacheStatus(h http.Header) (c CacheStatus, ok bool) {
	values := h.Values(HeaderCacheStatus)
	if len(values) == 0 {
		return c, false
	}
	list, err := httpsfv.UnmarshalList(values)
	if err != nil {
		return c, false
	}
	for i := len(list) - 1; i >= 0; i-- {
		it, isItem := list[i].(httpsfv.Item)
		if !isItem || !namesStint(it.Value) {
			continue
		}
		p := it.Params
		c.Hit = boolParam(p, "hit")
		c.Fwd = tokenParam(p, "fwd")
		if v, ok := p.Get("fwd-status"); ok {
			if n, isInt := v.(int64); isInt {
				c.FwdStatus = int(n)
			}
		}
		if v, ok := p.Get("ttl"); ok {
			if n, isInt := v.(int64); isInt {
				c.TTL, c.HasTTL = time.Duration(n)*time.Second, true
			}
		}
		c.Stored = boolParam(p, "stored")
		c.Collapsed = boolParam(p, "collapsed")
		if v, ok := p.Get("key"); ok {
			c.Key, _ = v.(string)
		}
		c.Detail = tokenParam(p, "detail")
		return c, true
	}
	return c, false
}

// CacheOutcome is the outcome of h's Cache-Status (see CacheStatus.Outcome);
// "" without one.
func CacheOutcome(h http.Header) string {
	c, _ := ParseCacheStatus(h)
	return c.Outcome()
}

// namesStint reports whether a list member's value identifies stint: the
// token or the string CacheName.
func namesStint(v any) bool {
	switch x := v.(type) {
	case httpsfv.Token:
		return string(x) == CacheName
	case string:
		return x == CacheName
	}
	return false
}

func boolParam(p *httpsfv.Params, name string) bool {
	v, _ := p.Get(name)
	b, _ := v.(bool)
	return b
}

// tokenParam reads a parameter that is a token, or a string (detail may be
// either, RFC 9211 §2.8).
func tokenParam(p *httpsfv.Params, name string) string {
	v, _ := p.Get(name)
	switch x := v.(type) {
	case httpsfv.Token:
		return string(x)
	case string:
		return x
	}
	return ""
}

// cacheStatusOf builds the Cache-Status of the answer to the request ll
// describes, whose outcome is outcome and whose upstream status (0: none)
// is fwdStatus.
func (p *Proxy) cacheStatusOf(ll *logLine, outcome string, fwdStatus int) CacheStatus {
	c := CacheStatus{Key: ll.key}
	switch outcome {
	case OutcomeReplay:
		c.Hit, c.Detail, c.Key = true, DetailReplay, ""
		return c
	case OutcomeHit:
		c.Hit = true
		if p.ttl > 0 && ll.storedAt > 0 {
			age := time.Duration(max(0, nowUnix(p.now())-ll.storedAt)) * time.Second
			c.TTL, c.HasTTL = p.ttl-age, true
		}
	case OutcomeBypass:
		c.Fwd, c.Key = FwdBypass, ""
	case OutcomePartial:
		c.Fwd = FwdPartial
	case OutcomeShared:
		c.Fwd, c.Collapsed = FwdMiss, true
	default:
		c.Fwd = FwdMiss
	}
	if c.Fwd == FwdMiss && ll.noCache {
		c.Fwd = FwdRequest
	}
	if !c.Hit {
		c.FwdStatus = fwdStatus
		c.Stored = ll.stored
		if c.Stored && p.ttl > 0 {
			c.TTL, c.HasTTL = p.ttl, true
		}
	}
	if ll.storeDown {
		c.Detail = DetailStoreUnavailable
	}
	return c
}

// setCacheStatus sets the Cache-Status of the answer ll describes on h.
func (p *Proxy) setCacheStatus(h http.Header, ll *logLine, outcome string, fwdStatus int) {
	h[HeaderCacheStatus] = []string{p.cacheStatusOf(ll, outcome, fwdStatus).String()}
}
