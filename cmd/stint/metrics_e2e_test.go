package main

import (
	"fmt"
	"io"
	"net/http"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestServeMetricsNeedAKeyWithTeams runs stint serve with teams: /metrics,
// which names them, is refused without a key and served to the metrics
// token (from the environment) and to an admin key; with the section set
// to open it is served to anyone.
func TestServeMetricsNeedAKeyWithTeams(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const (
		team  = "lab-metrics-key"
		admin = "metrics-admin-key"
		token = "scrape-token-7"
	)
	base := configHead(filepath.Join(t.TempDir(), "data"), up.URL()) + fmt.Sprintf(`teams:
  - name: lab
    keys: ["sha256:%s"]
admin:
  keys: ["sha256:%s"]
`, keyHash(team), keyHash(admin))
	get := func(t *testing.T, c *child, key string) int {
		t.Helper()
		req, err := http.NewRequest(http.MethodGet, "http://"+c.addr+"/metrics", nil)
		require.NoError(t, err)
		if key != "" {
			req.Header.Set("Authorization", "Bearer "+key)
		}
		resp, err := http.DefaultClient.Do(req)
		require.NoError(t, err)
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode == http.StatusOK {
			assert.True(t, strings.Contains(string(b), "stint_"), "no stint metrics in %s", b)
		}
		return resp.StatusCode
	}
	tests := []struct {
		name    string
		section string
		want    map[string]int // key sent -> status
	}{
		{"default", "", map[string]int{"": 401, team: 401, admin: 200}},
		{"default with a token", "metrics:\n  token_env: STINT_TEST_METRICS_TOKEN\n", map[string]int{"": 401, team: 401, admin: 200, token: 200}},
		{"token only", "metrics:\n  auth: token\n  token_env: STINT_TEST_METRICS_TOKEN\n", map[string]int{"": 401, admin: 401, token: 200}},
		{"open", "metrics:\n  auth: open\n", map[string]int{"": 200}},
		{"off", "metrics:\n  auth: off\n", map[string]int{"": 404, admin: 404}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			section := tt.section
			c := startStint(t, []string{"STINT_TEST_METRICS_TOKEN=" + token}, "serve", "--config", writeConfig(t, base+section))
			for key, status := range tt.want {
				assert.Equal(t, status, get(t, c, key), "key %q", key)
			}
		})
	}
}
