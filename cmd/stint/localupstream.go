package main

import (
	"context"
	"net/http"
	"os"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/localmodel"
)

// localUpstreamClient loads the local model and returns an HTTP client whose
// transport runs it in-process (no network hop), and the model.
func localUpstreamClient(_ context.Context, path string) (*http.Client, *localmodel.Model, func() error, error) {
	resolved, err := localmodel.Locate(path, os.Getenv)
	if err != nil {
		return nil, nil, nil, err
	}
	m, err := localmodel.Load(resolved)
	if err != nil {
		return nil, nil, nil, err
	}
	h := localmodel.NewHandler(m, localmodel.HandlerOptions{})
	return &http.Client{Transport: proxy.HandlerTransport(h)}, m, func() error { return nil }, nil
}
