package main

import (
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
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
			require.Error(t, err, "got no error")
			assert.Falsef(t, !strings.Contains(err.Error(), tt.wantText) || !strings.Contains(err.Error(), "line "+strconv.Itoa(tt.wantLine)), "error %q, want it to name %q and line %d", err, tt.wantText, tt.wantLine)
		})
	}
}

func TestUIConfigValues(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader("ui:\n  search_sidecar: http://10.0.0.7:8789\n  sidecar_timeout: 750ms\n  refresh: 10s\n"))
	require.NoError(t, err)
	want := UIConfig{SearchSidecar: "http://10.0.0.7:8789", SidecarTimeout: Duration(750 * time.Millisecond), Refresh: Duration(10 * time.Second)}
	assert.Equal(t, want, cfg.UI, "ui: %+v, want %+v", cfg.UI, want)
	ex, err := ParseConfig(strings.NewReader(exampleConfig))
	require.NoError(t, err, "example config")
	assert.Falsef(t, ex.UI.SidecarTimeout != Duration(2*time.Second) || ex.UI.Refresh != Duration(5*time.Second), "example ui section: %+v, want the documented 2s timeout and 5s refresh", ex.UI)
}
