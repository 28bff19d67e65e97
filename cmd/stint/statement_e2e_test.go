package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// configHead starts a test config: a loopback port, the data dir and the
// fake upstream.
func configHead(data, upURL string) string {
	return fmt.Sprintf("listen: 127.0.0.1:0\ndata: %s\nupstreams:\n  - name: fake\n    url: %s\n", data, upURL)
}

// keyHash is a key's stored form without its "sha256:" prefix.
func keyHash(key string) string {
	sum := sha256.Sum256([]byte(key))
	return hex.EncodeToString(sum[:])
}

// writeConfig writes a config file and returns its path.
func writeConfig(t *testing.T, text string) string {
	t.Helper()
	path := filepath.Join(t.TempDir(), "stint.yaml")
	require.NoError(t, os.WriteFile(path, []byte(text), 0o600))
	return path
}

// spendConfig writes a config with one priced model and a team budget.
func spendConfig(t *testing.T, upURL, data, lease string) (path, key string) {
	t.Helper()
	key = "lab-e2e-key"
	return writeConfig(t, configHead(data, upURL)+fmt.Sprintf(`teams:
  - name: lab
    keys: ["sha256:%s"]
    budget: {usd: 1.00, per: total}
prices:
  quill-small: {input: 2.0, output: 6.0}   # invented test prices
budget:
  lease: %s
`, keyHash(key), lease)), key
}

func post(t *testing.T, c *child, key, body string) (*http.Response, []byte) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodPost, "http://"+c.addr+"/v1/completions", strings.NewReader(body))
	req.Header.Set("Authorization", "Bearer "+key)
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatalf("POST: %v", err)
	}
	defer resp.Body.Close()
	var b bytes.Buffer
	_, _ = b.ReadFrom(resp.Body)
	return resp, b.Bytes()
}

// statementJSON runs `stint statement --json` on data.
func statementJSON(t *testing.T, data string) statement {
	t.Helper()
	cmd := newRootCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetArgs([]string{"statement", "--data", data, "--json"})
	require.NoError(t, cmd.Execute(), "stint statement")
	var rep statement
	require.NoErrorf(t, json.Unmarshal(out.Bytes(), &rep), "spend JSON %s", out.Bytes())
	return rep
}

func stop(t *testing.T, c *child) {
	t.Helper()
	require.NoError(t, c.cmd.Process.Signal(syscall.SIGTERM))
	<-c.exited
}

func TestServeChargesBudgetAndReportsSpend(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	data := t.TempDir()
	cfgPath, key := spendConfig(t, up.URL(), data, "10m")
	c := startStint(t, nil, "serve", "--config", cfgPath)
	body := `{"model":"quill-small","prompt":"the co-op pays for its crates","temperature":0,"max_tokens":6}`
	miss, _ := post(t, c, key, body)
	hit, _ := post(t, c, key, body)
	require.Falsef(t, miss.StatusCode != 200 || cacheOutcome(hit.Header) != "hit", "miss %d, then %q", miss.StatusCode, cacheOutcome(hit.Header))
	cost := miss.Header.Get("Stint-Cost-Usd")
	zero, _ := strconv.ParseFloat(hit.Header.Get("Stint-Cost-Usd"), 64)
	assert.Falsef(t, cost == "" || cost == "0.00" || zero != 0 || hit.Header.Get("Stint-Saved-Usd") != cost, "miss cost %q; hit cost %q saved %q: a hit costs nothing and saves what the miss cost",
		cost, hit.Header.Get("Stint-Cost-Usd"), hit.Header.Get("Stint-Saved-Usd"))
	stop(t, c)
	rep := statementJSON(t, data)
	assert.Falsef(t, rep.Total.Requests != 2 || rep.Total.UpstreamCalls != 1 || rep.Total.SpentUSD != cost || rep.Total.SavedUSD != cost, "spend report %+v, want 2 requests, 1 upstream call, spent = saved = %s", rep.Total, cost)
}

// TestKilledProxyReservationsSettleConservatively kills a proxy while its
// calls hold reservations; a new proxy's lease sweep charges them at the
// reserved amount, never refunding them.
func TestKilledProxyReservationsSettleConservatively(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	data := t.TempDir()
	cfgPath, key := spendConfig(t, up.URL(), data, "1s")
	// An admin key, so the test can watch the statement while it waits.
	f, err := os.OpenFile(cfgPath, os.O_APPEND|os.O_WRONLY, 0)
	require.NoError(t, err)
	_, err = fmt.Fprintf(f, "admin:\n  keys: [\"sha256:%s\"]\n", keyHash(replicaAdminKey))
	require.NoError(t, err)
	f.Close()
	first := startStint(t, nil, "serve", "--config", cfgPath)
	up.Block()
	const held = 3
	for i := range held {
		go func() {
			req, _ := http.NewRequest(http.MethodPost, "http://"+first.addr+"/v1/completions",
				strings.NewReader(fmt.Sprintf(`{"model":"quill-small","prompt":"held call %d","temperature":0,"max_tokens":50}`, i)))
			req.Header.Set("Authorization", "Bearer "+key)
			if resp, err := http.DefaultClient.Do(req); err == nil {
				resp.Body.Close()
			}
		}()
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, held))
	require.NoError(t, first.cmd.Process.Signal(syscall.SIGKILL))
	<-first.exited
	up.Release()

	second := startStint(t, nil, "serve", "--config", cfgPath)
	// The 1 s lease runs out and the sweep (every 1 s) charges the holds.
	awaitSpend(t, second, 0.0009)
	stop(t, second)
	rep := statementJSON(t, data)
	// Each held call reserved at least its worst-case output, 50 tokens at
	// 6 USD per million (hand-worked: 3 × 50 × 6e-6 = 0.0009 USD); expiry
	// charges the whole reservation, so the spend is at least that.
	spent, err := strconv.ParseFloat(rep.Total.SpentUSD, 64)
	require.Falsef(t, err != nil || spent < 0.0009, "after the lease expired %q was charged, want at least 0.0009: %+v", rep.Total.SpentUSD, rep.Total)
	assert.Equal(t, int64(0), rep.Total.Requests, "expired reservations counted as %d requests, want 0", rep.Total.Requests)
}

// awaitSpend polls c's admin statement (with replicaAdminKey) until its
// total spend reaches usd (bounded).
func awaitSpend(t *testing.T, c *child, usd float64) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		req, _ := http.NewRequest(http.MethodGet, "http://"+c.addr+"/stint/admin/statement", nil)
		req.Header.Set("Authorization", "Bearer "+replicaAdminKey)
		var st statement
		if resp, err := http.DefaultClient.Do(req); err == nil {
			err = json.NewDecoder(resp.Body).Decode(&st)
			resp.Body.Close()
			if spent, _ := strconv.ParseFloat(st.Total.SpentUSD, 64); err == nil && spent >= usd {
				return
			}
		}
		require.Falsef(t, time.Now().After(deadline), "the statement's spend never reached %v USD: %+v", usd, st.Total)
		time.Sleep(20 * time.Millisecond) // polling interval
	}
}
