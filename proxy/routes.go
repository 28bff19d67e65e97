package proxy

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// routes is the proxy's mux: the generation pipeline (pipeline.go), the
// model list, health and readiness, the admin API (admin.go), the runs API
// (runsapi.go), the operator page (ui.go) and /metrics. A known path asked
// with another method answers 405 with Allow, any other path 404.
func (p *Proxy) routes(opts Options) *http.ServeMux {
	mux := http.NewServeMux()
	mux.HandleFunc("POST /v1/completions", func(w http.ResponseWriter, r *http.Request) { p.serveGenerate(w, r, endpointCompletions) })
	mux.HandleFunc("POST /v1/chat/completions", func(w http.ResponseWriter, r *http.Request) { p.serveGenerate(w, r, endpointChat) })
	mux.HandleFunc("GET /v1/models", p.serveModels)
	mux.HandleFunc("GET /healthz", p.serveHealth)
	mux.HandleFunc("GET /readyz", p.serveReady)
	p.routeAdmin(mux)
	p.routeRuns(mux)
	p.routeUI(mux, opts)
	if opts.Gatherer != nil && !opts.Metrics.Off {
		mux.HandleFunc("GET /metrics", p.metricsHandler(promhttp.HandlerFor(opts.Gatherer, promhttp.HandlerOpts{}), opts.Metrics))
	}
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		if allow := allowedMethods(mux, r); len(allow) > 0 {
			w.Header().Set("Allow", strings.Join(allow, ", "))
			writeError(w, &apiError{status: http.StatusMethodNotAllowed, typ: errInvalidRequest, code: "method_not_allowed",
				message: fmt.Sprintf("%s is not allowed on %s; use %s", r.Method, r.URL.Path, strings.Join(allow, " or "))})
			return
		}
		writeError(w, &apiError{status: http.StatusNotFound, typ: errInvalidRequest, code: "unknown_url", message: fmt.Sprintf("no route for %s %s", r.Method, r.URL.Path)})
	})
	return mux
}

func (p *Proxy) serveHealth(w http.ResponseWriter, _ *http.Request) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	_, _ = io.WriteString(w, "ok\n")
}

func (p *Proxy) serveReady(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	if p.draining.Load() {
		w.WriteHeader(http.StatusServiceUnavailable)
		_, _ = io.WriteString(w, "draining\n")
		return
	}
	ctx, cancel := context.WithTimeout(r.Context(), 2*time.Second)
	defer cancel()
	if _, _, err := p.store.Get(ctx, "readyz-probe"); err != nil {
		if p.shared != nil {
			// Every replica shares this store: failing them all would turn
			// a degraded cache into an outage. Answers go on from upstream.
			_, _ = io.WriteString(w, "ready (cache store unavailable)\n")
			return
		}
		w.WriteHeader(http.StatusServiceUnavailable)
		_, _ = io.WriteString(w, "cache store unavailable\n")
		return
	}
	_, _ = io.WriteString(w, "ready\n")
}

// probedMethods are the methods allowedMethods tries, in the order Allow
// lists them.
var probedMethods = [...]string{http.MethodGet, http.MethodHead, http.MethodPost, http.MethodPut, http.MethodPatch, http.MethodDelete}

// allowedMethods lists the methods other than r's that mux routes r's path
// for, other than to its catch-all "/": a known path asked with the wrong
// method gets 405 with them as Allow (RFC 9110 §15.5.6), not 404.
func allowedMethods(mux *http.ServeMux, r *http.Request) []string {
	var allow []string
	for _, m := range probedMethods {
		if m == r.Method {
			continue
		}
		probe := &http.Request{Method: m, URL: r.URL, Host: r.Host, Header: http.Header{}}
		if _, pattern := mux.Handler(probe); pattern != "" && pattern != "/" {
			allow = append(allow, m)
		}
	}
	return allow
}
