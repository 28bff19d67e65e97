package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// twoTeamConfig writes a config with teams lab and kiln on data.
func twoTeamConfig(t *testing.T, upURL, data string) string {
	t.Helper()
	return writeConfig(t, configHead(data, upURL)+fmt.Sprintf(`teams:
  - name: lab
    keys: ["sha256:%s"]
  - name: kiln
    keys: ["sha256:%s"]
prices:
  quill-small: {input: 2.0, output: 6.0}   # invented test prices
admin:
  keys: ["sha256:%s"]
`, keyHash("lab-run-key"), keyHash("kiln-run-key"), keyHash(replicaAdminKey)))
}

func runPost(t *testing.T, c *child, key, body string, headers ...string) (int, string, []byte) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodPost, "http://"+c.addr+"/v1/completions", strings.NewReader(body))
	req.Header.Set("Authorization", "Bearer "+key)
	for i := 0; i+1 < len(headers); i += 2 {
		req.Header.Set(headers[i], headers[i+1])
	}
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err, "POST")
	defer resp.Body.Close()
	var b bytes.Buffer
	_, _ = b.ReadFrom(resp.Body)
	return resp.StatusCode, cacheOutcome(resp.Header), b.Bytes()
}

// TestRunSurvivesRestartAndExportImport records a run, restarts the proxy
// and replays it, exports it, imports it into a fresh data dir behind
// another proxy and replays it there: every answer byte-identical, no
// upstream call during any replay; another team sees none of it.
func TestRunSurvivesRestartAndExportImport(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	cfg := twoTeamConfig(t, up.URL(), t.TempDir())
	c := startStint(t, nil, "serve", "--config", cfg)
	bodies := []string{
		`{"model":"quill-small","prompt":"the quince harvest begins","temperature":0.8,"max_tokens":6}`,
		`{"model":"quill-small","prompt":"the quince harvest begins","temperature":0.8,"max_tokens":6}`,
		`{"model":"quill-small","prompt":"the quince harvest begins","temperature":0,"max_tokens":6}`,
		`{"model":"quill-small","prompt":"the quince harvest begins","temperature":0.8,"max_tokens":6,"stream":true}`,
	}
	var recorded [][]byte
	for i, b := range bodies {
		status, _, body := runPost(t, c, "lab-run-key", b, "Stint-Run", "quince-1")
		require.Equal(t, http.StatusOK, status, "record %d: %d %s", i, status, body)
		recorded = append(recorded, body)
	}
	replayAll := func(c *child, where string) {
		t.Helper()
		calls := up.Calls()
		for i, b := range bodies {
			status, outcome, body := runPost(t, c, "lab-run-key", b, "Stint-Run", "quince-1", "Stint-Run-Mode", "replay", "Stint-Replay-Session", where)
			assert.Falsef(t, status != http.StatusOK || outcome != "replay" || !bytes.Equal(body, recorded[i]), "%s: replay %d: %d %q, identical %v", where, i, status, outcome, bytes.Equal(body, recorded[i]))
		}
		assert.Equal(t, calls, up.Calls(), "%s: the replay reached the upstream", where)
	}
	stop(t, c)
	c = startStint(t, nil, "serve", "--config", cfg)
	replayAll(c, "after-restart")

	proxyAt := "http://" + c.addr
	t.Setenv(teamKeyEnv, "lab-run-key")
	out, err := runCLI(t, "runs", "show", "quince-1", "--proxy", proxyAt)
	require.Falsef(t, err != nil || !strings.Contains(out, "quince-1"), "runs show: %v\n%s", err, out)
	// The detail: calls by model and by cache outcome, and the replay
	// session this process answered (the sampled calls are bypass, the
	// greedy one a miss).
	for _, want := range []string{"MODEL", "quill-small", "CACHE", "bypass", "miss", "REPLAY SESSION", "after-restart"} {
		assert.Contains(t, out, want, "runs show does not show %q:\n%s", want, out)
	}
	out, err = runCLI(t, "runs", "show", "quince-1", "--proxy", proxyAt+"/v1", "--json")
	var d proxy.RunDetail
	require.Falsef(t, err != nil || json.Unmarshal([]byte(out), &d) != nil, "runs show --json: %v\n%s", err, out)
	outcomes := map[string]int64{}
	for _, g := range d.ByOutcome {
		outcomes[g.Name] = g.Calls
	}
	assert.Falsef(t, d.Calls != 4 || len(d.ByModel) != 1 || d.ByModel[0].Name != "quill-small" || d.ByModel[0].Calls != 4 ||
		outcomes["bypass"] != 3 || outcomes["miss"] != 1 || len(d.Replays) != 1 || d.Replays[0] != (proxy.ReplaySession{Session: "after-restart", Calls: 4}), "runs show --json: %+v", d)
	archive := filepath.Join(t.TempDir(), "quince-1.stintrun")
	out, err = runCLI(t, "runs", "export", "quince-1", "-o", archive, "--proxy", proxyAt)
	require.NoError(t, err, "runs export: %v\n%s", err, out)

	// The spend journal names the run of each call it recorded.
	t.Setenv(adminKeyEnv, replicaAdminKey)
	out, err = runCLI(t, "statement", "--proxy", proxyAt, "--by", "run", "--json")
	var rep statement
	require.Falsef(t, err != nil || json.Unmarshal([]byte(out), &rep) != nil, "spend by run: %v\n%s", err, out)
	var found bool
	for _, row := range rep.Rows {
		found = found || (row.Group == "quince-1" && row.Requests == int64(len(bodies)))
	}
	assert.Truef(t, found, "spend by run %+v: want a row for quince-1 with %d requests", rep.Rows, len(bodies))

	t.Setenv(teamKeyEnv, "kiln-run-key")
	out, err = runCLI(t, "runs", "show", "quince-1", "--proxy", proxyAt)
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "404"), "another team's runs show: %v\n%s, want 404", err, out)
	out, err = runCLI(t, "runs", "list", "--proxy", proxyAt)
	assert.Falsef(t, err != nil || strings.Contains(out, "quince-1"), "another team's runs list shows the run: %v\n%s", err, out)
	status, _, body := runPost(t, c, "kiln-run-key", bodies[0], "Stint-Run", "quince-1", "Stint-Run-Mode", "replay")
	assert.Equal(t, http.StatusNotFound, status, "another team's replay: %d %s, want 404", status, body)

	fresh := startStint(t, nil, "serve", "--config", twoTeamConfig(t, up.URL(), t.TempDir()))
	t.Setenv(teamKeyEnv, "lab-run-key")
	raw, err := os.ReadFile(archive)
	require.NoError(t, err)
	cut := filepath.Join(t.TempDir(), "cut.stintrun")
	require.NoError(t, os.WriteFile(cut, raw[:len(raw)/2], 0o600))
	out, err = runCLI(t, "runs", "import", cut, "--proxy", "http://"+fresh.addr)
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "corrupt"), "import of a cut archive: %v\n%s, want a corrupt-archive refusal", err, out)
	out, err = runCLI(t, "runs", "import", archive, "--proxy", "http://"+fresh.addr)
	require.NoError(t, err, "runs import: %v\n%s", err, out)
	replayAll(fresh, "after-import")
	// Importing it again says what to do in the command's own flags.
	_, err = runCLI(t, "runs", "import", archive, "--proxy", "http://"+fresh.addr)
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "--as NEW-ID") || !strings.Contains(err.Error(), "--replace") || strings.Contains(err.Error(), "as=") || strings.Contains(err.Error(), "replace="), "a second import: %v, want a refusal naming --as and --replace, not the API's query names", err)
	out, err = runCLI(t, "runs", "import", archive, "--replace", "--json", "--proxy", "http://"+fresh.addr)
	assert.Falsef(t, err != nil || !strings.Contains(out, `"run": "quince-1"`), "runs import --replace --json: %v\n%s", err, out)
}
