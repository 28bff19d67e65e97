package main

import (
	"encoding/base64"
	"io"
	"net/http"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestServeMasksTheUpstreamKeyAnUpstreamEchoes runs stint serve with its
// key in STINT_UPSTREAM_KEY in front of an upstream that repeats the
// Authorization header it received in its 401, on completions, streamed
// completions and the model list.
func TestServeMasksTheUpstreamKeyAnUpstreamEchoes(t *testing.T) {
	const key = "e2e-upstream-secret-42"
	up := upstreamtest.New(upstreamtest.Options{Key: key})
	defer up.Close()
	c := startStint(t, []string{"STINT_UPSTREAM_KEY=" + key}, "serve", "--upstream", up.URL(), "--listen", "127.0.0.1:0", "--data", filepath.Join(t.TempDir(), "data"))
	tests := []struct {
		name, method, path, body string
		fault                    upstreamtest.Fault
	}{
		{"completion", http.MethodPost, "/v1/completions", `{"model":"quill-small","prompt":"a","temperature":0,"max_tokens":2}`, upstreamtest.Fault{Status: 401, EchoAuth: true}},
		{"streamed completion", http.MethodPost, "/v1/completions", `{"model":"quill-small","prompt":"b","temperature":0,"max_tokens":2,"stream":true}`, upstreamtest.Fault{Status: 401, EchoAuth: true}},
		{"model list", http.MethodGet, "/v1/models", "", upstreamtest.Fault{Path: upstreamtest.PathModels, Status: 401, EchoAuth: true}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			up.FailNext(1, tt.fault)
			req, err := http.NewRequest(tt.method, "http://"+c.addr+tt.path, strings.NewReader(tt.body))
			require.NoError(t, err)
			resp, err := http.DefaultClient.Do(req)
			require.NoError(t, err)
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			require.Equal(t, http.StatusUnauthorized, resp.StatusCode, "%s", b)
			assert.Contains(t, string(b), "Incorrect API key provided", "not the upstream's own answer")
			all := string(b) + resp.Header.Get(upstreamtest.HeaderReceivedAuth)
			for _, form := range []string{key, base64.StdEncoding.EncodeToString([]byte("Bearer " + key)), base64.StdEncoding.EncodeToString([]byte("apikey:" + key))} {
				assert.NotContains(t, all, form)
			}
		})
	}
	assert.NotContains(t, c.output(), key, "the log holds the key")
}
