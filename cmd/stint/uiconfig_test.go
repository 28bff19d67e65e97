package main

import (
	"strconv"
	"strings"
	"testing"
	"time"
)

func TestUIConfigErrorsNameFieldAndLine(t *testing.T) {
	tests := []struct {
		name     string
		yaml     string
		wantLine int
		wantText string
	}{
		{"sidecar not a URL", "ui:\n  search_sidecar: sidecar:8789\n", 2, "ui.search_sidecar"},
		{"sidecar without host", "ui:\n  search_sidecar: http://\n", 2, "ui.search_sidecar"},
		{"sidecar other scheme", "ui:\n  search_sidecar: ftp://127.0.0.1:8789\n", 2, "http://"},
		{"negative timeout", "ui:\n  sidecar_timeout: -1s\n", 2, "ui.sidecar_timeout"},
		{"negative refresh", "ui:\n\n  refresh: -5s\n", 3, "ui.refresh"},
		{"unknown key", "ui:\n  sidecar: http://127.0.0.1:8789\n", 2, "sidecar"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(tt.yaml))
			if err == nil {
				t.Fatal("got no error")
			}
			if !strings.Contains(err.Error(), tt.wantText) || !strings.Contains(err.Error(), "line "+strconv.Itoa(tt.wantLine)) {
				t.Errorf("error %q, want it to name %q and line %d", err, tt.wantText, tt.wantLine)
			}
		})
	}
}

func TestUIConfigValues(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader("ui:\n  search_sidecar: http://10.0.0.7:8789\n  sidecar_timeout: 750ms\n  refresh: 10s\n"))
	if err != nil {
		t.Fatal(err)
	}
	want := UIConfig{SearchSidecar: "http://10.0.0.7:8789", SidecarTimeout: Duration(750 * time.Millisecond), Refresh: Duration(10 * time.Second)}
	if cfg.UI != want {
		t.Errorf("ui: %+v, want %+v", cfg.UI, want)
	}
	ex, err := ParseConfig(strings.NewReader(exampleConfig))
	if err != nil {
		t.Fatalf("example config: %v", err)
	}
	if ex.UI.SidecarTimeout != Duration(2*time.Second) || ex.UI.Refresh != Duration(5*time.Second) {
		t.Errorf("example ui section: %+v, want the documented 2s timeout and 5s refresh", ex.UI)
	}
}
