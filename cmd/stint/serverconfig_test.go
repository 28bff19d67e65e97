package main

import (
	"crypto/sha256"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

func TestServerSectionDefaultsAndValues(t *testing.T) {
	def := DefaultConfig().Server
	assert.Equal(t, 10*time.Second, time.Duration(def.ReadHeaderTimeout))
	assert.Equal(t, time.Minute, time.Duration(def.ReadTimeout))
	assert.Equal(t, time.Minute, time.Duration(def.WriteTimeout))
	assert.Equal(t, 2*time.Minute, time.Duration(def.IdleTimeout))
	assert.Equal(t, 256, def.MaxInFlightPerTeam)
	assert.Equal(t, 2048, def.MaxPrompts)

	cfg, err := ParseConfig(strings.NewReader(`server:
  read_header_timeout: 2s
  read_timeout: 20s
  write_timeout: 45s
  idle_timeout: 90s
  max_in_flight_per_team: 32
  max_prompts: 100
teams:
  - name: lab
    keys: ["sha256:` + strings.Repeat("a", 64) + `"]
    max_in_flight: -1
`))
	require.NoError(t, err)
	assert.Equal(t, 2*time.Second, time.Duration(cfg.Server.ReadHeaderTimeout))
	assert.Equal(t, 20*time.Second, time.Duration(cfg.Server.ReadTimeout))
	assert.Equal(t, 45*time.Second, time.Duration(cfg.Server.WriteTimeout))
	assert.Equal(t, 90*time.Second, time.Duration(cfg.Server.IdleTimeout))
	assert.Equal(t, 32, cfg.Server.MaxInFlightPerTeam)
	assert.Equal(t, 100, cfg.Server.MaxPrompts)
	assert.Equal(t, -1, cfg.Teams[0].MaxInFlight)
	teams, err := buildTeams(cfg.Teams)
	require.NoError(t, err)
	assert.Equal(t, -1, teams[0].MaxInFlight)

	ex, err := ParseConfig(strings.NewReader(exampleConfig))
	require.NoError(t, err)
	assert.Equal(t, def, ex.Server, "the example's server section is not the defaults")
}

func TestServerSectionRefusals(t *testing.T) {
	tests := []struct {
		name, yaml, field string
		line              int
	}{
		{"no read timeout", "server:\n  read_timeout: 0s\n", "server.read_timeout", 2},
		{"negative write timeout", "server:\n  write_timeout: -1s\n", "server.write_timeout", 2},
		{"no idle timeout", "server:\n  idle_timeout: 0s\n", "server.idle_timeout", 2},
		{"no header timeout", "server:\n  read_header_timeout: 0s\n", "server.read_header_timeout", 2},
		{"header timeout past read timeout", "server:\n  read_timeout: 5s\n  read_header_timeout: 6s\n", "server.read_header_timeout", 3},
		{"no prompts", "server:\n  max_prompts: 0\n", "server.max_prompts", 2},
		{"negative in-flight cap", "server:\n  max_in_flight_per_team: -3\n", "server.max_in_flight_per_team", 2},
		{"team in-flight cap below -1", "teams:\n  - name: lab\n    keys: [\"sha256:" + strings.Repeat("a", 64) + "\"]\n    max_in_flight: -2\n", "teams[0].max_in_flight", 4},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(tt.yaml))
			var ce *ConfigError
			require.True(t, errors.As(err, &ce), "got %v, want a ConfigError", err)
			assert.Equal(t, tt.field, ce.Field)
			assert.Equal(t, tt.line, ce.Line)
		})
	}
}

func TestUpstreamSecretsNameEveryKeyInTheEnvironment(t *testing.T) {
	env := map[string]string{"STINT_UPSTREAM_KEY": "default-upstream-key", "BACKUP_KEY": "backup-upstream-key", "UNSET": ""}
	got := upstreamSecrets([]UpstreamConfig{
		{Name: "main", URL: "https://a.example/v1", KeyEnv: "STINT_UPSTREAM_KEY"},
		{Name: "backup", URL: "https://b.example/v1", KeyEnv: "BACKUP_KEY"},
		{Name: "empty", URL: "https://c.example/v1", KeyEnv: "UNSET"},
		{Name: "open", URL: "https://d.example/v1"},
	}, func(k string) string { return env[k] })
	assert.ElementsMatch(t, []string{"default-upstream-key", "default-upstream-key", "backup-upstream-key"}, got)
}

func TestMetricsSection(t *testing.T) {
	team := "teams:\n  - name: lab\n    keys: [\"sha256:" + strings.Repeat("a", 64) + "\"]\n"
	env := func(k string) (string, bool) {
		if k == "SCRAPE_TOKEN" {
			return "scrape-token", true
		}
		return "", false
	}
	tokenHash := sha256.Sum256([]byte("scrape-token"))
	tests := []struct {
		name, yaml string
		want       proxy.MetricsAccess
		wantErr    string
	}{
		{"no config, no teams: open", "", proxy.MetricsAccess{}, ""},
		{"teams: admin keys by default", team, proxy.MetricsAccess{Admin: true}, ""},
		{"teams and a token", team + "metrics:\n  token_env: SCRAPE_TOKEN\n", proxy.MetricsAccess{Admin: true, TokenHashes: [][32]byte{tokenHash}}, ""},
		{"token only", "metrics:\n  auth: token\n  token_env: SCRAPE_TOKEN\n", proxy.MetricsAccess{TokenHashes: [][32]byte{tokenHash}}, ""},
		{"open with teams", team + "metrics:\n  auth: open\n", proxy.MetricsAccess{}, ""},
		{"off", "metrics:\n  auth: off\n", proxy.MetricsAccess{Off: true}, ""},
		{"token not set", "metrics:\n  auth: token\n  token_env: UNSET_TOKEN\n", proxy.MetricsAccess{}, "UNSET_TOKEN is not set"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg, err := ParseConfig(strings.NewReader(tt.yaml))
			require.NoError(t, err)
			got, err := metricsAccess(cfg, env)
			if tt.wantErr != "" {
				assert.ErrorContains(t, err, tt.wantErr)
				return
			}
			require.NoError(t, err)
			assert.Equal(t, tt.want, got)
		})
	}
	refusals := []struct {
		name, yaml, field string
		line              int
	}{
		{"unknown auth", "metrics:\n  auth: maybe\n", "metrics.auth", 2},
		{"token without its variable", "metrics:\n  auth: token\n", "metrics.auth", 2},
		{"a token nobody reads", "metrics:\n  auth: open\n  token_env: SCRAPE_TOKEN\n", "metrics.token_env", 3},
	}
	for _, tt := range refusals {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(tt.yaml))
			var ce *ConfigError
			require.True(t, errors.As(err, &ce), "got %v, want a ConfigError", err)
			assert.Equal(t, tt.field, ce.Field)
			assert.Equal(t, tt.line, ce.Line)
		})
	}
}

func TestBreakerProbeEvery(t *testing.T) {
	tests := []struct {
		name, breaker string
		want          time.Duration
	}{
		{"default: a sixth of the default open_for", "", 5 * time.Second},
		{"a sixth of open_for", "    breaker: {open_for: 1m}\n", 10 * time.Second},
		{"given", "    breaker: {open_for: 1m, probe_every: 2s}\n", 2 * time.Second},
		{"off", "    breaker: {probe_every: 0s}\n", 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg, err := ParseConfig(strings.NewReader("upstreams:\n  - name: main\n    url: http://127.0.0.1:1/v1\n" + tt.breaker))
			require.NoError(t, err)
			assert.Equal(t, tt.want, cfg.Upstreams[0].breakerSettings().ProbeEvery)
		})
	}
}
