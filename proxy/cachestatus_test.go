package proxy_test

import (
	"context"
	"net/http"
	"regexp"
	"sync"
	"testing"
	"time"

	"github.com/dunglas/httpsfv"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// sfList matches an RFC 8941 §3.1 List whose members are bare Items with
// parameters, written from the ABNF of RFC 8941 itself, apart from the
// library parse below:
//
//	sf-list       = list-member *( OWS "," OWS list-member )         §3.1
//	parameters    = *( ";" *SP parameter )                           §3.1.2
//	parameter     = param-key [ "=" param-value ]
//	key           = ( lcalpha / "*" ) *( lcalpha / DIGIT / "_" / "-" / "." / "*" )
//	sf-integer    = ["-"] 1*15DIGIT                                  §3.3.1
//	sf-string     = DQUOTE *chr DQUOTE                               §3.3.3
//	chr           = unescaped / escaped
//	unescaped     = %x20-21 / %x23-5B / %x5D-7E
//	escaped       = "\" ( DQUOTE / "\" )
//	sf-token      = ( ALPHA / "*" ) *( tchar / ":" / "/" )           §3.3.4
//	sf-boolean    = "?" boolean                                      §3.3.6
var sfList = func() *regexp.Regexp {
	const (
		token   = `[A-Za-z*][!#$%&'*+\-.^_` + "`" + `|~0-9A-Za-z:/]*`
		integer = `-?[0-9]{1,15}`
		str     = `"(?:[\x20\x21\x23-\x5b\x5d-\x7e]|\\["\\])*"`
		boolean = `\?[01]`
		bare    = `(?:` + integer + `|` + str + `|` + token + `|` + boolean + `)`
		key     = `[a-z*][a-z0-9_\-.*]*`
		params  = `(?:; *` + key + `(?:=` + bare + `)?)*`
		member  = bare + params
	)
	return regexp.MustCompile(`^` + member + `(?:[ \t]*,[ \t]*` + member + `)*$`)
}()

// fwdReasons are the fwd values RFC 9211 §2.2 defines.
var fwdReasons = map[string]bool{"bypass": true, "method": true, "uri-miss": true, "vary-miss": true, "miss": true, "request": true, "stale": true, "partial": true}

// checkCacheStatus checks one Cache-Status value against RFC 8941's
// syntax and RFC 9211's rules for the parameters, and returns stint's
// member.
func checkCacheStatus(t *testing.T, value string) proxy.CacheStatus {
	t.Helper()
	require.NotEmpty(t, value, "no Cache-Status")
	assert.Regexp(t, sfList, value, "not an RFC 8941 §3.1 List")
	list, err := httpsfv.UnmarshalList([]string{value})
	require.NoError(t, err, "RFC 8941 §4.2 parse of %q", value)
	require.Len(t, list, 1, "stint adds one member (RFC 9211 §2)")
	again, err := httpsfv.Marshal(list)
	require.NoError(t, err)
	assert.Equal(t, again, value, "not in RFC 8941 §4.1 canonical serialization (e.g. a true Boolean written =?1)")
	it, ok := list[0].(httpsfv.Item)
	require.True(t, ok, "the member must be an Item, not an Inner List")
	assert.Equal(t, httpsfv.Token(proxy.CacheName), it.Value, "the member identifies the cache with a Token (RFC 9211 §2)")
	for _, name := range it.Params.Names() {
		v, _ := it.Params.Get(name)
		switch name {
		case "hit", "stored", "collapsed": // §2.1, §2.5, §2.6: Booleans, sent only when true
			assert.Equal(t, true, v, "%s must be a true Boolean", name)
		case "fwd": // §2.2: a Token among the RFC's reasons
			tok, isTok := v.(httpsfv.Token)
			assert.True(t, isTok && fwdReasons[string(tok)], "fwd %v is not one of RFC 9211 §2.2's reasons", v)
		case "fwd-status": // §2.3: an Integer status code
			n, isInt := v.(int64)
			assert.True(t, isInt && n >= 100 && n <= 599, "fwd-status %v is not a status code", v)
		case "ttl": // §2.4: an Integer, seconds
			_, isInt := v.(int64)
			assert.True(t, isInt, "ttl %v is not an Integer", v)
		case "key": // §2.7: a String
			_, isStr := v.(string)
			assert.True(t, isStr, "key %v is not a String", v)
		case "detail": // §2.8: a Token or a String
			switch v.(type) {
			case httpsfv.Token, string:
			default:
				assert.Failf(t, "detail of the wrong type", "detail %v is neither a Token nor a String", v)
			}
		default:
			assert.Failf(t, "unknown parameter", "parameter %q is not one of RFC 9211 §2's", name)
		}
	}
	hit, _ := it.Params.Get("hit")
	_, fwd := it.Params.Get("fwd")
	assert.False(t, hit == true && fwd, "hit (§2.1: not forwarded) and fwd (§2.2: forwarded) together")
	for _, name := range []string{"fwd-status", "stored", "collapsed"} {
		_, has := it.Params.Get(name)
		assert.False(t, has && !fwd, "%s describes a forwarded request (RFC 9211 §2.3, §2.5, §2.6) but fwd is absent", name)
	}
	cs, ok := proxy.ParseCacheStatus(http.Header{proxy.HeaderCacheStatus: {value}})
	require.True(t, ok)
	return cs
}

// TestCacheStatusFollowsRFC9211 runs each way a request can be handled
// through a proxy and checks the answer's Cache-Status: its grammar
// against RFC 8941 and its parameters against RFC 9211.
func TestCacheStatusFollowsRFC9211(t *testing.T) {
	noLeaks(t)
	r := newRig(t, func(o *proxy.Options) { o.CacheTTL = time.Hour })
	miss := r.complete(greedy("the ferry keeper counts crates"))
	hit := r.complete(greedy("the ferry keeper counts crates"))
	refresh := r.complete(greedy("the ferry keeper counts crates"), "Cache-Control", "no-cache")
	noStore := r.complete(greedy("a crate the keeper never keeps"), "Cache-Control", "no-store")
	partial := r.complete(greedy([]string{"the ferry keeper counts crates", "a second crate arrives"}))
	bypass := r.complete(sampled("a sampled tale of the ferry"))
	streamMiss := r.complete(greedy("a streamed crate", "stream", true))
	streamHit := r.complete(greedy("a streamed crate", "stream", true))
	r.up.FailNext(1, upstreamtest.Fault{Path: upstreamtest.PathCompletions, Status: http.StatusInternalServerError})
	failed := r.complete(greedy("the upstream falls over"))
	models, err := http.Get(r.srv.URL + "/v1/models")
	require.NoError(t, err)
	models.Body.Close()

	cases := []struct {
		name    string
		got     response
		want    proxy.CacheStatus
		outcome string
	}{
		{"miss", miss, proxy.CacheStatus{Fwd: "miss", FwdStatus: 200, Stored: true, HasTTL: true, TTL: time.Hour}, proxy.OutcomeMiss},
		{"hit", hit, proxy.CacheStatus{Hit: true, HasTTL: true}, proxy.OutcomeHit},
		{"no-cache refresh", refresh, proxy.CacheStatus{Fwd: "request", FwdStatus: 200, Stored: true, HasTTL: true, TTL: time.Hour}, proxy.OutcomeMiss},
		{"no-store", noStore, proxy.CacheStatus{Fwd: "miss", FwdStatus: 200}, proxy.OutcomeMiss},
		{"batch partly cached", partial, proxy.CacheStatus{Fwd: "partial", FwdStatus: 200, Stored: true, HasTTL: true, TTL: time.Hour}, proxy.OutcomePartial},
		{"sampled", bypass, proxy.CacheStatus{Fwd: "bypass", FwdStatus: 200}, proxy.OutcomeBypass},
		{"streamed miss", streamMiss, proxy.CacheStatus{Fwd: "miss", FwdStatus: 200}, proxy.OutcomeMiss},
		{"streamed hit", streamHit, proxy.CacheStatus{Hit: true, HasTTL: true}, proxy.OutcomeHit},
		{"upstream error", failed, proxy.CacheStatus{Fwd: "miss", FwdStatus: 500}, proxy.OutcomeMiss},
		{"models list", response{status: models.StatusCode, header: models.Header}, proxy.CacheStatus{Fwd: "miss", FwdStatus: 200, Stored: true}, proxy.OutcomeMiss},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cs := checkCacheStatus(t, c.got.header.Get(proxy.HeaderCacheStatus))
			assert.Equal(t, c.outcome, cs.Outcome())
			single := c.name != "batch partly cached" && c.name != "sampled" && c.name != "models list"
			assert.Equal(t, single, cs.Key != "", "key (RFC 9211 §2.7) on single-prompt cached requests only: %q", cs.Key)
			if c.want.Hit {
				// The remaining freshness: at most the configured ttl.
				assert.True(t, cs.TTL > 0 && cs.TTL <= time.Hour, "ttl %v", cs.TTL)
				c.want.TTL = cs.TTL
			}
			c.want.Key = cs.Key
			assert.Equal(t, c.want, cs)
		})
	}
	// RFC 8941 §4.1.1.2 writes parameters with no space after ";".
	assert.Regexp(t, `^stint;fwd=miss;fwd-status=200;ttl=3600;stored;key="[0-9a-f]+"$`, miss.header.Get(proxy.HeaderCacheStatus))
}

// TestCacheStatusCollapsed: requests answered by an identical request's
// upstream call say collapsed (RFC 9211 §2.6).
func TestCacheStatusCollapsed(t *testing.T) {
	noLeaks(t)
	r := newRig(t)
	r.up.Block()
	const clients = 3
	got := make([]response, clients)
	var wg sync.WaitGroup
	for i := range clients {
		wg.Go(func() { got[i] = r.complete(greedy("three keepers ask at once")) })
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	require.NoError(t, r.up.AwaitHeld(ctx, 1))
	waitFor(t, "two coalesced waiters", func() bool { return r.metric("stint_coalesced_waiting") == clients-1 })
	r.up.Release()
	wg.Wait()
	collapsed := 0
	for _, g := range got {
		cs := checkCacheStatus(t, g.header.Get(proxy.HeaderCacheStatus))
		if cs.Collapsed {
			collapsed++
			assert.Equal(t, proxy.OutcomeShared, cs.Outcome())
			assert.Equal(t, "miss", cs.Fwd)
			assert.False(t, cs.Stored, "the leader stored the answer, not this request")
		}
	}
	assert.Equal(t, clients-1, collapsed)
}

// TestCacheStatusReplay: a replayed answer is a hit with detail=replay
// (RFC 9211 §2.8: what the RFC has no parameter for).
func TestCacheStatusReplay(t *testing.T) {
	noLeaks(t)
	r := newRunRig(t)
	body := greedy("the ledger of the ferry", "max_tokens", 5)
	rec := r.complete(body, proxy.HeaderRun, "ferry-1")
	require.Equal(t, http.StatusOK, rec.status, "%s", rec.body)
	checkCacheStatus(t, rec.header.Get(proxy.HeaderCacheStatus))
	rep := r.complete(body, proxy.HeaderRun, "ferry-1", proxy.HeaderRunMode, "replay")
	require.Equal(t, http.StatusOK, rep.status, "%s", rep.body)
	cs := checkCacheStatus(t, rep.header.Get(proxy.HeaderCacheStatus))
	assert.Equal(t, proxy.CacheStatus{Hit: true, Detail: proxy.DetailReplay}, cs)
	assert.Equal(t, proxy.OutcomeReplay, cs.Outcome())
	assert.Equal(t, "stint;hit;detail=replay", rep.header.Get(proxy.HeaderCacheStatus))
}

// TestParseCacheStatusPicksStint: behind other caches, ParseCacheStatus
// reads stint's member (RFC 9211 §2: one member per cache, nearest the
// client last) and ignores the others'.
func TestParseCacheStatusPicksStint(t *testing.T) {
	cases := []struct {
		name   string
		values []string
		want   proxy.CacheStatus
		ok     bool
	}{
		{"alone", []string{"stint; hit"}, proxy.CacheStatus{Hit: true}, true},
		{"behind a CDN", []string{`stint; fwd=miss; fwd-status=200; stored, "edge-7"; hit`}, proxy.CacheStatus{Fwd: "miss", FwdStatus: 200, Stored: true}, true},
		{"two header lines", []string{"origin-cache; fwd=uri-miss", "stint; hit; ttl=12"}, proxy.CacheStatus{Hit: true, TTL: 12 * time.Second, HasTTL: true}, true},
		{"string identifier", []string{`"stint"; fwd=bypass`}, proxy.CacheStatus{Fwd: "bypass"}, true},
		{"detail as a string", []string{`stint; hit; detail="replay"`}, proxy.CacheStatus{Hit: true, Detail: "replay"}, true},
		{"other caches only", []string{"edge; hit"}, proxy.CacheStatus{}, false},
		{"not a list", []string{"stint; hit=?2"}, proxy.CacheStatus{}, false},
		{"absent", nil, proxy.CacheStatus{}, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, ok := proxy.ParseCacheStatus(http.Header{proxy.HeaderCacheStatus: c.values})
			assert.Equal(t, c.ok, ok)
			assert.Equal(t, c.want, got)
		})
	}
}

// TestCacheStatusString: the hand-written serializer writes what an RFC
// 8941 implementation (httpsfv) parses and writes back unchanged (§4.1
// canonical form), and what ParseCacheStatus reads back.
func TestCacheStatusString(t *testing.T) {
	cases := []proxy.CacheStatus{
		{},
		{Hit: true, TTL: 90 * time.Second, HasTTL: true, Key: "0123abcd"},
		{Hit: true, TTL: -5 * time.Second, HasTTL: true}, // stale: RFC 9211 §2.4 allows a negative ttl
		{Fwd: "miss", FwdStatus: 200, Stored: true, Collapsed: true, Key: `a "quoted" \ key`},
		{Fwd: "partial", FwdStatus: 502, Detail: proxy.DetailStoreUnavailable},
		{Hit: true, Detail: proxy.DetailReplay},
		{Fwd: "request", FwdStatus: 200, TTL: time.Hour, HasTTL: true, Stored: true},
	}
	for _, c := range cases {
		t.Run(c.String(), func(t *testing.T) {
			got := checkCacheStatus(t, c.String())
			assert.Equal(t, c, got)
		})
	}
	// Values an sf-token or sf-string cannot hold are left out, never
	// written broken.
	odd := proxy.CacheStatus{Fwd: "not a token", Key: "caf\u00e9", Detail: "9lives"}
	assert.Equal(t, "stint", odd.String())
}
