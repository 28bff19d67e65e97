package main

import (
	"bytes"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/upstreamtest"
	"github.com/stintlab/stint/searcher/jobs"
)

// errorTypes and errorCodes are the one set of types and codes the three
// servers answer errors with (README "Errors").
var (
	errorTypes = map[string]bool{"invalid_request_error": true, "authentication_error": true, "permission_error": true,
		"rate_limit_error": true, "upstream_error": true, "cache_error": true, "server_error": true}
	errorCodes = map[string]bool{"unknown_url": true, "method_not_allowed": true, "invalid_json": true, "invalid_value": true,
		"body_too_large": true, "model_not_routed": true, "run_not_found": true, "job_not_found": true, "output_not_found": true, "store_unavailable": true,
		"context_length_exceeded": true, "internal_error": true, "missing_key": true, "invalid_key": true, "admin_off": true, "spend_off": true}
)

// wireError is the one error body: {"error":{"message","type","param","code"}}.
type wireError struct {
	Error struct {
		Message string  `json:"message"`
		Type    string  `json:"type"`
		Param   *string `json:"param"`
		Code    string  `json:"code"`
	} `json:"error"`
}

// checkErrorBody decodes an error answer strictly and checks its shape.
func checkErrorBody(t *testing.T, resp *http.Response, body []byte, wantStatus int, wantCode string) wireError {
	t.Helper()
	assert.Equal(t, wantStatus, resp.StatusCode, "%s", body)
	assert.Equal(t, "application/json", strings.Split(resp.Header.Get("Content-Type"), ";")[0], "%s", body)
	var members map[string]map[string]json.RawMessage
	require.NoError(t, json.Unmarshal(body, &members), "not JSON: %s", body)
	require.Len(t, members, 1, "%s", body)
	inner := members["error"]
	for _, k := range []string{"message", "type", "param", "code"} {
		assert.Contains(t, inner, k, "member %q missing: %s", k, body)
	}
	assert.Len(t, inner, 4, "extra members: %s", body)
	dec := json.NewDecoder(bytes.NewReader(body))
	dec.DisallowUnknownFields()
	var e wireError
	require.NoError(t, dec.Decode(&e), "%s", body)
	assert.NotEmpty(t, e.Error.Message)
	assert.True(t, errorTypes[e.Error.Type], "type %q is not one of the set", e.Error.Type)
	assert.True(t, errorCodes[e.Error.Code], "code %q is not one of the set", e.Error.Code)
	assert.Equal(t, wantCode, e.Error.Code, "%s", body)
	if wantStatus == http.StatusMethodNotAllowed {
		assert.NotEmpty(t, resp.Header.Get("Allow"), "a 405 must say Allow (RFC 9110 §15.5.6)")
	}
	return e
}

// TestErrorsShareOneShape sends every kind of bad request to the proxy,
// the search sidecar and the local model server, and checks that each
// error has the one body shape and a code from the one set.
func TestErrorsShareOneShape(t *testing.T) {
	model, err := localmodel.Load(modeltest.Path(t))
	require.NoError(t, err)

	up := upstreamtest.New(upstreamtest.Options{})
	t.Cleanup(up.Close)
	store, err := boltstore.Open(filepath.Join(t.TempDir(), "stint.db"), boltstore.Options{})
	require.NoError(t, err)
	t.Cleanup(func() { _ = store.Close() })
	journal, err := runs.NewBolt(store.DB(), runs.BoltOptions{})
	require.NoError(t, err)
	p, err := proxy.New(proxy.Options{Store: store, Upstreams: []proxy.Upstream{{Name: "fake", BaseURL: up.URL(), Timeout: 10 * time.Second}},
		Runs: journal, MaxBodyBytes: 1 << 10})
	require.NoError(t, err)
	t.Cleanup(func() { _ = p.Close(t.Context()) })
	proxySrv := httptest.NewServer(p)
	t.Cleanup(proxySrv.Close)

	mgr, err := jobs.Open(t.TempDir(), model, jobs.Options{Proxy: proxySrv.URL + "/v1"})
	require.NoError(t, err)
	t.Cleanup(mgr.Close)
	sidecar := httptest.NewServer(mgr.Handler())
	t.Cleanup(sidecar.Close)

	local := httptest.NewServer(localmodel.NewHandler(model, localmodel.HandlerOptions{MaxBodyBytes: 1 << 10}))
	t.Cleanup(local.Close)

	big := `{"model":"` + strings.Repeat("x", 2<<10) + `"}`
	cases := []struct {
		name, base, method, path, body string
		status                         int
		code                           string
	}{
		{"proxy: unknown path", proxySrv.URL, "GET", "/v2/nothing", "", 404, "unknown_url"},
		{"proxy: wrong method", proxySrv.URL, "GET", "/v1/completions", "", 405, "method_not_allowed"},
		{"proxy: wrong method on the runs API", proxySrv.URL, "PUT", "/stint/runs", "", 405, "method_not_allowed"},
		{"proxy: not JSON", proxySrv.URL, "POST", "/v1/completions", "{not json", 400, "invalid_json"},
		{"proxy: an array, not an object", proxySrv.URL, "POST", "/v1/completions", "[]", 400, "invalid_json"},
		{"proxy: bad value", proxySrv.URL, "POST", "/v1/completions", `{"model":"m","prompt":"p","temperature":-1}`, 400, "invalid_value"},
		{"proxy: body too large", proxySrv.URL, "POST", "/v1/completions", big, 413, "body_too_large"},
		{"proxy: unknown run", proxySrv.URL, "GET", "/stint/runs/nothing-here", "", 404, "run_not_found"},
		{"proxy: no spend control", proxySrv.URL, "GET", "/stint/admin/budgets", "", 404, "spend_off"},
		{"sidecar: unknown path", sidecar.URL, "GET", "/nothing", "", 404, "unknown_url"},
		{"sidecar: wrong method", sidecar.URL, "DELETE", "/jobs", "", 405, "method_not_allowed"},
		{"sidecar: wrong method on a job", sidecar.URL, "DELETE", "/jobs/abc", "", 405, "method_not_allowed"},
		{"sidecar: not JSON", sidecar.URL, "POST", "/jobs", "{not json", 400, "invalid_json"},
		{"sidecar: unknown field", sidecar.URL, "POST", "/jobs", `{"taks":"x.yaml"}`, 400, "invalid_value"},
		{"sidecar: no task", sidecar.URL, "POST", "/jobs", `{}`, 400, "invalid_value"},
		{"sidecar: unknown job", sidecar.URL, "GET", "/jobs/nothing-here", "", 404, "job_not_found"},
		{"sidecar: unknown output", sidecar.URL, "GET", "/jobs/nothing-here/out/secrets.txt", "", 404, "output_not_found"},
		{"sidecar: output of an unknown job", sidecar.URL, "GET", "/jobs/nothing-here/out/results.json", "", 404, "job_not_found"},
		{"local: unknown path", local.URL, "GET", "/v2/nothing", "", 404, "unknown_url"},
		{"local: wrong method", local.URL, "GET", "/v1/completions", "", 405, "method_not_allowed"},
		{"local: not JSON", local.URL, "POST", "/v1/completions", "{not json", 400, "invalid_json"},
		{"local: bad value", local.URL, "POST", "/v1/completions", `{"prompt":"p","temperature":-1}`, 400, "invalid_value"},
		{"local: body too large", local.URL, "POST", "/v1/completions", big, 413, "body_too_large"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			req, err := http.NewRequestWithContext(t.Context(), c.method, c.base+c.path, strings.NewReader(c.body))
			require.NoError(t, err)
			if c.body != "" {
				req.Header.Set("Content-Type", "application/json")
			}
			resp, err := http.DefaultClient.Do(req)
			require.NoError(t, err)
			defer resp.Body.Close()
			b, err := io.ReadAll(resp.Body)
			require.NoError(t, err)
			e := checkErrorBody(t, resp, b, c.status, c.code)
			assert.NotRegexp(t, goInternals, e.Error.Message)
		})
	}
}

// goInternals matches what no error message should show a person: Go's
// type and package names, encoding/json's wording, float64's limits.
var goInternals = regexp.MustCompile(`json: |Go (struct field|value)|map\[|RawMessage|main\.[A-Z]|\bstruct \{|e\+308|unmarshal`)
