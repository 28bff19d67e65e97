package main

import (
	"context"
	"io"
	"log/slog"
	"net"

	"github.com/stintlab/stint/searcher/search"
)

// Invented demo prices of the local model, USD per million tokens, not any
// provider's: the demo's proxy and the --local proxy of the comparison
// commands charge them, and their searches forecast at them.
const demoInputPrice, demoOutputPrice = 0.50, 1.50

// localProxy is an in-process proxy on the embedded store in front of the
// local model, at the demo prices. It serves one user, so its runs have no
// storage quota: a comparison records every one of its searches (tens of
// MB each), far past the default quota a shared proxy keeps per team.
type localProxy struct {
	srv    *server
	url    string // base URL, version path included
	stop   context.CancelFunc
	served chan error
}

// startLocalProxy starts a local proxy with its store under data.
func startLocalProxy(ctx context.Context, modelPath, data string) (*localProxy, error) {
	cfg := DefaultConfig()
	cfg.Listen, cfg.Data = "127.0.0.1:0", data
	cfg.Upstreams = []UpstreamConfig{{Name: "local", URL: "local:" + modelPath}}
	cfg.Runs.QuotaBytes = -1
	cfg.Prices = map[string]PriceConfig{"stories260K": {Input: Number{Value: demoInputPrice, Set: true}, Output: Number{Value: demoOutputPrice, Set: true}}}
	if err := cfg.Validate(nil); err != nil {
		return nil, err
	}
	srv, err := buildServer(ctx, cfg, slog.New(slog.NewTextHandler(io.Discard, nil)), nil)
	if err != nil {
		return nil, err
	}
	ln, err := net.Listen("tcp", cfg.Listen)
	if err != nil {
		srv.close()
		return nil, err
	}
	sctx, stop := context.WithCancel(ctx)
	lp := &localProxy{srv: srv, url: "http://" + ln.Addr().String() + "/v1", stop: stop, served: make(chan error, 1)}
	go func() { lp.served <- srv.serve(sctx, ln) }()
	return lp, nil
}

// Close stops the proxy and waits for it.
func (lp *localProxy) Close() error {
	lp.stop()
	return <-lp.served
}

// demoPriceOverride makes a search forecast at the demo prices.
func demoPriceOverride() search.PriceOverride {
	in, out := demoInputPrice, demoOutputPrice
	return search.PriceOverride{InputPerMillion: &in, OutputPerMillion: &out}
}
