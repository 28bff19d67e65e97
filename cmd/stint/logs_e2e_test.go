package main

import (
	"encoding/json"
	"fmt"
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestRequestLogLines runs stint serve with each log format and checks the
// one-line-per-request log: a line per request with team, model, cache
// outcome and tokens; never the client's key; the prompt text only with
// --log-prompts.
func TestRequestLogLines(t *testing.T) {
	tests := []struct {
		format  string
		prompts bool
	}{
		{"json", false},
		{"json", true},
		{"text", false},
		{"text", true},
	}
	for _, tc := range tests {
		t.Run(fmt.Sprintf("%s/prompts=%v", tc.format, tc.prompts), func(t *testing.T) {
			t.Parallel()
			up := upstreamtest.New(upstreamtest.Options{})
			defer up.Close()
			const key = "reading-corner-secret-key"
			cfg := writeConfig(t, configHead(t.TempDir(), up.URL())+fmt.Sprintf("teams:\n  - name: corner\n    keys: [\"sha256:%s\"]\n", keyHash(key)))
			args := []string{"serve", "--config", cfg, "--log-format", tc.format}
			if tc.prompts {
				args = append(args, "--log-prompts")
			}
			c := startStint(t, nil, args...)
			const prompt = "the lantern by the reading corner"
			body := fmt.Sprintf(`{"model":"quill-small","prompt":%q,"temperature":0,"max_tokens":4}`, prompt)
			for _, want := range []string{"miss", "hit"} {
				req, _ := http.NewRequest(http.MethodPost, "http://"+c.addr+"/v1/completions", strings.NewReader(body))
				req.Header.Set("Authorization", "Bearer "+key)
				req.Header.Set("Content-Type", "application/json")
				resp, err := http.DefaultClient.Do(req)
				require.NoError(t, err)
				resp.Body.Close()
				got := cacheOutcome(resp.Header)
				require.Falsef(t, resp.StatusCode != 200 || got != want, "status %d, cache outcome %q; want 200 %q", resp.StatusCode, got, want)
			}
			// Request lines are buffered for at most a tenth of a second.
			waitForLog(t, c, map[string]string{"json": `"cache":"hit"`, "text": "cache=hit"}[tc.format])
			var lines []string
			for _, l := range strings.Split(c.output(), "\n") {
				if strings.Contains(l, "request") && strings.Contains(l, "cache") {
					lines = append(lines, l)
				}
			}
			require.Lenf(t, lines, 2, "request lines in:\n%s", c.output())
			for i, l := range lines {
				assert.Falsef(t, strings.Contains(l, key), "line %d holds the client key: %s", i, l)
				got := strings.Contains(l, prompt)
				assert.Equal(t, tc.prompts, got, "line %d: prompt text present=%v, want %v: %s", i, got, tc.prompts, l)
				if tc.format == "json" {
					var rec map[string]any
					err := json.Unmarshal([]byte(l), &rec)
					require.NoError(t, err, "line %d is not JSON: %v: %s", i, err, l)
					want := map[string]any{"msg": "request", "level": "INFO", "team": "corner", "model": "quill-small", "cache": []string{"miss", "hit"}[i], "status": 200.0}
					for k, v := range want {
						assert.Equal(t, v, rec[k], "line %d: %s = %v, want %v", i, k, rec[k], v)
					}
					assert.Falsef(t, rec["prompt_tokens"].(float64) <= 0 || rec["completion_tokens"].(float64) <= 0, "line %d: no token counts: %s", i, l)
				} else {
					assert.Containsf(t, l, "team=corner", "line %d lacks the team", i)
					assert.Containsf(t, l, "model=quill-small", "line %d lacks the model", i)
				}
			}
		})
	}
}
