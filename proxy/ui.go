package proxy

import (
	"net/http"
	"time"

	"github.com/stintlab/stint/proxy/opsview"
)

// UIOptions configure the operator page (GET /ui, package opsview). It is
// on whenever admin keys are configured.
type UIOptions struct {
	// SearchSidecar is the base URL of the search sidecar's job API
	// (`stint search serve`); empty shows no searches.
	SearchSidecar string
	// SidecarTimeout bounds the page's calls to the sidecar; zero means
	// opsview.DefaultSidecarTimeout.
	SidecarTimeout time.Duration
	// Refresh is how often the open page polls for new figures; zero means
	// opsview.DefaultRefresh, -1 never.
	Refresh time.Duration
}

// routeUI mounts the operator page on mux.
func (p *Proxy) routeUI(mux *http.ServeMux, opts Options) {
	o := opsview.Options{
		AdminKeyHashes: p.adminKeys,
		Gatherer:       opts.Gatherer,
		Sidecar:        opts.UI.SearchSidecar,
		SidecarTimeout: opts.UI.SidecarTimeout,
		Refresh:        opts.UI.Refresh,
		Now:            p.now,
	}
	if sa, ok := p.spend.(opsview.Statementer); ok {
		o.Spend = sa
	}
	if p.runs != nil {
		o.Runs = p.runs
	}
	if p.open != nil {
		o.Teams = []string{p.open.Name}
	}
	for _, t := range p.teams {
		o.Teams = append(o.Teams, t.Name)
	}
	for _, u := range p.upstreams {
		o.Upstreams = append(o.Upstreams, u.Name)
	}
	opsview.New(o).Route(mux)
}
