// Package opsview is stint's operator page: one HTML page (GET /ui) that
// shows what a running proxy is doing, and the same figures as JSON
// (GET /ui/snapshot.json).
//
// The page has six panels: each team's spend against its budget, requests
// by cache outcome, money saved, the upstreams (calls, latency, breaker
// state), recent recorded runs with their cache share, and the search
// sidecar's searches with their learning curves. It is rendered on the
// server with html/template; its stylesheet and a small script are
// embedded in the binary, so nothing is fetched from the network. The
// script polls the JSON snapshot and, when its digest changes, swaps in a
// freshly rendered page body, so the figures and curves stay live; without
// the script the page is still complete.
//
// The page sits behind the admin keys: a browser sends one as the password
// of HTTP Basic authentication (RFC 7617; the user name is ignored), other
// clients as a bearer token. Without admin keys the page is off (403).
// Nothing on it carries a key.
package opsview

import (
	"context"
	"crypto/sha256"
	"crypto/subtle"
	"embed"
	"encoding/json"
	"html/template"
	"io/fs"
	"net/http"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/cache/runs"
)

// Prefix is the path of the page; the snapshot and the assets live below it.
const Prefix = "/ui"

// Defaults of Options.
const (
	DefaultRefresh        = 5 * time.Second
	DefaultSidecarTimeout = 2 * time.Second
	DefaultMaxRuns        = 8
	DefaultMaxSearches    = 4
	DefaultSince          = "7d"
)

// Statementer reports spend; the proxy's spend control (*guard.Guard)
// implements it.
type Statementer interface {
	Statement(ctx context.Context, q budget.Query) (budget.Statement, error)
}

// RunLister lists a team's recorded runs; every runs.Journal implements it.
type RunLister interface {
	List(ctx context.Context, team string) ([]runs.Summary, error)
}

// Options configure the page. Zero values mean the documented default.
type Options struct {
	// AdminKeyHashes are SHA-256 digests of the keys that may see the page;
	// empty turns it off.
	AdminKeyHashes [][sha256.Size]byte
	// Spend reports spend and budgets; nil shows spend control as off.
	Spend Statementer
	// Runs lists recorded runs; nil shows record/replay as off.
	Runs RunLister
	// Teams are the configured team names, in config order.
	Teams []string
	// Upstreams are the configured upstream names, in config order.
	Upstreams []string
	// Gatherer holds the proxy's metrics; nil shows no request figures.
	Gatherer prometheus.Gatherer
	// Sidecar is the search sidecar's base URL (its job API); empty shows
	// no searches.
	Sidecar string
	// Client calls the sidecar; nil means a plain client. Each page view
	// gives the sidecar SidecarTimeout in all.
	Client *http.Client
	// SidecarTimeout bounds the sidecar calls of one view; zero means
	// DefaultSidecarTimeout.
	SidecarTimeout time.Duration
	// Refresh is how often the page's script polls the snapshot; zero means
	// DefaultRefresh, -1 turns polling off.
	Refresh time.Duration
	// MaxRuns and MaxSearches bound the lists shown; zero means
	// DefaultMaxRuns and DefaultMaxSearches.
	MaxRuns, MaxSearches int
	// Now is the clock; nil means time.Now.
	Now func() time.Time
}

// static holds the stylesheet and the script; page.html is the page's
// template.
//
//go:embed static
var staticFiles embed.FS

//go:embed page.html
var pageSource string

// View serves the operator page. It is safe for concurrent use; create it
// with New.
type View struct {
	o      Options
	page   *template.Template
	static http.Handler
}

// New builds a View from opts.
func New(opts Options) *View {
	o := opts
	if o.Client == nil {
		o.Client = &http.Client{}
	}
	if o.SidecarTimeout <= 0 {
		o.SidecarTimeout = DefaultSidecarTimeout
	}
	switch {
	case o.Refresh == 0:
		o.Refresh = DefaultRefresh
	case o.Refresh < 0:
		o.Refresh = 0
	}
	if o.MaxRuns <= 0 {
		o.MaxRuns = DefaultMaxRuns
	}
	if o.MaxSearches <= 0 {
		o.MaxSearches = DefaultMaxSearches
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	o.Sidecar = strings.TrimRight(o.Sidecar, "/")
	// Both are embedded: they parse, or no test passes.
	page := template.Must(template.New("page.html").Funcs(funcMap()).Parse(pageSource))
	sub, err := fs.Sub(staticFiles, "static")
	if err != nil {
		panic(err)
	}
	return &View{o: o, page: page, static: http.StripPrefix(Prefix+"/static/", http.FileServerFS(sub))}
}

// Route registers the page's endpoints on mux:
//
//	GET /ui                 the page (/ui/ redirects to it)
//	GET /ui/snapshot.json   the same figures as JSON
//	GET /ui/static/{file}   the stylesheet and the script
func (v *View) Route(mux *http.ServeMux) {
	mux.HandleFunc("GET "+Prefix, v.guard(v.servePage))
	mux.Handle("GET "+Prefix+"/{$}", http.RedirectHandler(Prefix, http.StatusMovedPermanently))
	mux.HandleFunc("GET "+Prefix+"/snapshot.json", v.guard(v.serveSnapshot))
	mux.HandleFunc("GET "+Prefix+"/static/{file}", v.guard(v.serveAsset))
}

// realm names the page in the browser's password prompt.
const realm = `Basic realm="stint operator page", charset="UTF-8"`

// guard lets through requests that carry an admin key, as a bearer token or
// as the Basic password.
func (v *View) guard(h http.HandlerFunc) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		secureHeaders(w.Header())
		if len(v.o.AdminKeyHashes) == 0 {
			http.Error(w, "the operator page is off: configure admin.keys", http.StatusForbidden)
			return
		}
		key, ok := presentedKey(r)
		if !ok {
			w.Header().Set("WWW-Authenticate", realm)
			http.Error(w, "an admin key is needed: give it as the password (any user name) or as Authorization: Bearer <admin key>", http.StatusUnauthorized)
			return
		}
		sum := sha256.Sum256([]byte(key))
		match := 0
		for _, h := range v.o.AdminKeyHashes {
			match |= subtle.ConstantTimeCompare(sum[:], h[:])
		}
		if match != 1 {
			w.Header().Set("WWW-Authenticate", realm)
			http.Error(w, "not an admin key", http.StatusUnauthorized)
			return
		}
		h(w, r)
	}
}

// presentedKey returns the key a request carries: a bearer token or the
// password of Basic authentication.
func presentedKey(r *http.Request) (string, bool) {
	h := r.Header.Get("Authorization")
	const bearer = "Bearer "
	if len(h) > len(bearer) && strings.EqualFold(h[:len(bearer)], bearer) {
		k := strings.TrimSpace(h[len(bearer):])
		return k, k != ""
	}
	if _, pass, ok := r.BasicAuth(); ok && pass != "" {
		return pass, true
	}
	return "", false
}

// secureHeaders keeps the page private and self-contained: nothing is
// cached, framed or loaded from elsewhere.
func secureHeaders(h http.Header) {
	h.Set("Cache-Control", "no-store")
	h.Set("Content-Security-Policy", "default-src 'none'; style-src 'self'; script-src 'self'; img-src 'self'; connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'")
	h.Set("X-Content-Type-Options", "nosniff")
	h.Set("Referrer-Policy", "no-referrer")
}

func (v *View) servePage(w http.ResponseWriter, r *http.Request) {
	snap, err := v.snapshotFor(r)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadRequest)
		return
	}
	var b strings.Builder
	if err := v.page.Execute(&b, pageData{Snapshot: snap, RefreshMs: v.o.Refresh.Milliseconds()}); err != nil {
		http.Error(w, "render the page: "+err.Error(), http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	_, _ = w.Write([]byte(b.String()))
}

func (v *View) serveSnapshot(w http.ResponseWriter, r *http.Request) {
	snap, err := v.snapshotFor(r)
	if err != nil {
		http.Error(w, err.Error(), http.StatusBadRequest)
		return
	}
	b, err := json.MarshalIndent(snap, "", "  ")
	if err != nil {
		http.Error(w, "encode the snapshot: "+err.Error(), http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "application/json")
	_, _ = w.Write(append(b, '\n'))
}

func (v *View) serveAsset(w http.ResponseWriter, r *http.Request) {
	v.static.ServeHTTP(w, r)
}

// snapshotFor takes a snapshot for the window the request asks for
// (?since=, as stint statement takes it; 7d by default).
func (v *View) snapshotFor(r *http.Request) (Snapshot, error) {
	since := r.URL.Query().Get("since")
	if since == "" {
		since = DefaultSince
	}
	now := v.o.Now()
	from, err := budget.ParseSince(since, now)
	if err != nil {
		return Snapshot{}, &fieldError{field: "since", err: err}
	}
	return v.Take(r.Context(), now, from, since), nil
}

// fieldError is a bad query parameter, naming it.
type fieldError struct {
	field string
	err   error
}

func (e *fieldError) Error() string { return e.field + ": " + e.err.Error() }
func (e *fieldError) Unwrap() error { return e.err }
