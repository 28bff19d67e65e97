package main

import (
	"errors"
	"fmt"
	"net/url"

	"go.yaml.in/yaml/v3"
)

// UIConfig is the `ui:` section: the operator page at /ui, on whenever
// admin keys are configured.
type UIConfig struct {
	// SearchSidecar is the base URL of the search sidecar's job API
	// (`stint search serve`), e.g. http://127.0.0.1:8789; empty shows no
	// searches.
	SearchSidecar string `yaml:"search_sidecar"`
	// SidecarTimeout bounds the page's calls to the sidecar (default 2s).
	SidecarTimeout Duration `yaml:"sidecar_timeout"`
	// Refresh is how often an open page polls for new figures (default
	// 5s).
	Refresh Duration `yaml:"refresh"`
}

// validateUI checks the ui section.
func (c *Config) validateUI(root *yaml.Node) error {
	bad := func(err error, path ...any) error {
		return &ConfigError{Field: fieldPath(path), Line: lineOf(root, path), Err: err}
	}
	if s := c.UI.SearchSidecar; s != "" {
		u, err := url.Parse(s)
		if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
			return bad(fmt.Errorf("%q must be an http:// or https:// URL with a host", s), "ui", "search_sidecar")
		}
	}
	if c.UI.SidecarTimeout < 0 {
		return bad(errors.New("sidecar_timeout must not be negative"), "ui", "sidecar_timeout")
	}
	if c.UI.Refresh < 0 {
		return bad(errors.New("refresh must not be negative"), "ui", "refresh")
	}
	return nil
}
