package opsview_test

import (
	"crypto/sha256"
	"encoding/json"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/stintlab/stint/proxy/opsview"
)

const adminKey = "sk-admin-opsview-test"

// serve mounts a view with opts (the admin key added) on a test server.
func serve(t *testing.T, opts opsview.Options) *httptest.Server {
	t.Helper()
	mux := http.NewServeMux()
	opsview.New(opts).Route(mux)
	srv := httptest.NewServer(mux)
	t.Cleanup(srv.Close)
	return srv
}

func withKey(opts opsview.Options) opsview.Options {
	opts.AdminKeyHashes = [][sha256.Size]byte{sha256.Sum256([]byte(adminKey))}
	return opts
}

// get fetches path with the given Authorization header ("" for none).
func get(t *testing.T, srv *httptest.Server, path, auth string) (*http.Response, string) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodGet, srv.URL+path, nil)
	if auth != "" {
		req.Header.Set("Authorization", auth)
	}
	resp, err := srv.Client().Do(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp, string(b)
}

func basic(user, pass string) string {
	req, _ := http.NewRequest(http.MethodGet, "http://x", nil)
	req.SetBasicAuth(user, pass)
	return req.Header.Get("Authorization")
}

func TestPageNeedsAnAdminKey(t *testing.T) {
	on := serve(t, withKey(opsview.Options{}))
	off := serve(t, opsview.Options{})
	tests := []struct {
		name      string
		srv       *httptest.Server
		path      string
		auth      string
		want      int
		challenge bool // answers with a Basic challenge, so a browser prompts
	}{
		{"off without admin keys", off, "/ui", "Bearer " + adminKey, http.StatusForbidden, false},
		{"snapshot off without admin keys", off, "/ui/snapshot.json", basic("ops", adminKey), http.StatusForbidden, false},
		{"no credentials", on, "/ui", "", http.StatusUnauthorized, true},
		{"wrong bearer", on, "/ui", "Bearer sk-not-it", http.StatusUnauthorized, true},
		{"wrong password", on, "/ui", basic("ops", "sk-not-it"), http.StatusUnauthorized, true},
		{"empty password", on, "/ui", basic(adminKey, ""), http.StatusUnauthorized, true},
		{"key as the user name only", on, "/ui/snapshot.json", basic(adminKey, "x"), http.StatusUnauthorized, true},
		{"stylesheet needs a key too", on, "/ui/static/stint.css", "", http.StatusUnauthorized, true},
		{"bearer", on, "/ui", "Bearer " + adminKey, http.StatusOK, false},
		{"bearer, any case", on, "/ui/snapshot.json", "bearer " + adminKey, http.StatusOK, false},
		{"basic, any user", on, "/ui", basic("whoever", adminKey), http.StatusOK, false},
		{"basic, no user", on, "/ui/static/live.js", basic("", adminKey), http.StatusOK, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			resp, body := get(t, tt.srv, tt.path, tt.auth)
			require.Equal(t, tt.want, resp.StatusCode, "status %d (%s), want %d", resp.StatusCode, body, tt.want)
			ch := resp.Header.Get("WWW-Authenticate")
			assert.Equal(t, strings.HasPrefix(ch, `Basic realm="stint operator page"`), tt.challenge, "WWW-Authenticate %q, challenge wanted: %v", ch, tt.challenge)
			assert.False(t, tt.want == http.StatusForbidden && !strings.Contains(body, "admin.keys"), "403 body %q does not say how to turn the page on", body)
			assert.Equal(t, "no-store", resp.Header.Get("Cache-Control"), "headers %v: want no-store and a strict content security policy", resp.Header)
			assert.Contains(t, resp.Header.Get("Content-Security-Policy"), "default-src 'none'", "headers %v: want no-store and a strict content security policy", resp.Header)
		})
	}
}

func TestAssetsAndTypes(t *testing.T) {
	srv := serve(t, withKey(opsview.Options{}))
	auth := "Bearer " + adminKey
	for path, want := range map[string]string{"/ui": "text/html", "/ui/snapshot.json": "application/json",
		"/ui/static/stint.css": "text/css", "/ui/static/live.js": "javascript"} {
		resp, body := get(t, srv, path, auth)
		assert.Equal(t, http.StatusOK, resp.StatusCode, "%s: %d %q, want 200 %s", path, resp.StatusCode, resp.Header.Get("Content-Type"), want)
		assert.Contains(t, resp.Header.Get("Content-Type"), want, "%s: %d %q, want 200 %s", path, resp.StatusCode, resp.Header.Get("Content-Type"), want)
		assert.NotEqual(t, "", body, "%s: %d %q, want 200 %s", path, resp.StatusCode, resp.Header.Get("Content-Type"), want)
	}
	srv.Client().CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	redirect, _ := get(t, srv, "/ui/", "")
	assert.Equal(t, http.StatusMovedPermanently, redirect.StatusCode, "/ui/: want a redirect")
	assert.Equal(t, "/ui", redirect.Header.Get("Location"), "/ui/: want a redirect to /ui")
	asset, _ := get(t, srv, "/ui/static/page.html", auth)
	assert.Equal(t, http.StatusNotFound, asset.StatusCode, "the template is served as an asset")
	resp, body := get(t, srv, "/ui/snapshot.json?since=fortnight", auth)
	assert.Equal(t, http.StatusBadRequest, resp.StatusCode, "bad since: %d %q, want 400 naming since", resp.StatusCode, body)
	assert.Contains(t, body, "since", "bad since: %d %q, want 400 naming since", resp.StatusCode, body)
}

func snapshot(t *testing.T, srv *httptest.Server) (opsview.Snapshot, string) {
	t.Helper()
	resp, body := get(t, srv, "/ui/snapshot.json", "Bearer "+adminKey)
	require.Equal(t, http.StatusOK, resp.StatusCode, "snapshot: %d %s", resp.StatusCode, body)
	var s opsview.Snapshot
	require.NoError(t, json.Unmarshal([]byte(body), &s))
	return s, body
}

// TestBreakerStateComesFromItsGauge registers the breaker's gauge and
// counter the way the proxy exports them and checks every state is read,
// and that an upstream without them shows no breaker.
func TestBreakerStateComesFromItsGauge(t *testing.T) {
	reg := prometheus.NewRegistry()
	state := prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "stint_upstream_breaker_state", Help: "0 closed, 1 half-open, 2 open"}, []string{"upstream"})
	trips := prometheus.NewCounterVec(prometheus.CounterOpts{Name: "stint_upstream_breaker_trips_total", Help: "trips"}, []string{"upstream"})
	reg.MustRegister(state, trips)
	state.WithLabelValues("north").Set(0)
	state.WithLabelValues("south").Set(1)
	state.WithLabelValues("east").Set(2)
	trips.WithLabelValues("east").Add(3)
	srv := serve(t, withKey(opsview.Options{Gatherer: reg, Upstreams: []string{"north", "south", "east", "west"}}))
	s, _ := snapshot(t, srv)
	want := map[string]string{"north": "closed", "south": "half-open", "east": "open", "west": "none"}
	require.Len(t, s.Upstreams, len(want), "upstreams %+v, want %d", s.Upstreams, len(want))
	for _, u := range s.Upstreams {
		assert.Equal(t, want[u.Name], u.Breaker, "%s: breaker %q, want %q", u.Name, u.Breaker, want[u.Name])
		assert.Equal(t, u.Name == "east", u.Trips != nil && *u.Trips == 3, "%s: trips %v, want 3 for east alone", u.Name, u.Trips)
	}
	_, page := get(t, srv, "/ui", "Bearer "+adminKey)
	for _, frag := range []string{`data-figure="breaker-east" data-value="open">open<`, `data-figure="breaker-west" data-value="none">no breaker<`, `data-figure="breaker-south" data-value="half-open"`} {
		assert.Contains(t, page, frag, "page lacks %s", frag)
	}
}

// TestSidecarStates: none configured, configured but down, and user info
// in its address never shown.
func TestSidecarStates(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	down := "http://ops:sk-sidecar-secret@" + ln.Addr().String()
	ln.Close() // nothing listens there now
	tests := []struct {
		name, sidecar, wantFigure, wantText string
	}{
		{"none", "", `data-figure="sidecar" data-value="off"`, "No search sidecar configured"},
		{"down", down, `data-figure="sidecar" data-value="unreachable"`, "Search sidecar unreachable at http://" + ln.Addr().String()},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			srv := serve(t, withKey(opsview.Options{Sidecar: tt.sidecar}))
			s, raw := snapshot(t, srv)
			assert.False(t, s.Search.Reachable || (tt.sidecar != "" && s.Search.Error != "sidecar unreachable"), "search %+v", s.Search)
			_, page := get(t, srv, "/ui", "Bearer "+adminKey)
			assert.Contains(t, page, tt.wantFigure, "page lacks %q / %q", tt.wantFigure, tt.wantText)
			assert.Contains(t, page, tt.wantText, "page lacks %q / %q", tt.wantFigure, tt.wantText)
			for _, secret := range []string{"sk-sidecar-secret", adminKey} {
				assert.NotContains(t, page, secret, "%q leaked onto the page or snapshot", secret)
				assert.NotContains(t, raw, secret, "%q leaked onto the page or snapshot", secret)
			}
		})
	}
}
