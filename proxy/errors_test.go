package proxy_test

import (
	"encoding/json"
	"net"
	"net/http"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

// goInternals matches what an error message must not show a person: Go's
// type and package names, encoding/json's wording, float64's limits.
var goInternals = regexp.MustCompile(`json: |Go (struct field|value)|map\[|RawMessage|main\.[A-Z]|\bstruct \{|e\+308|unmarshal|\[\]uint8`)

// errorOf decodes an answer's wire error.
func errorOf(t *testing.T, got response) (message, param, code string) {
	t.Helper()
	var e struct {
		Error struct {
			Message string  `json:"message"`
			Param   *string `json:"param"`
			Code    string  `json:"code"`
		} `json:"error"`
	}
	require.NoError(t, json.Unmarshal(got.body, &e), "%s", got.body)
	if e.Error.Param != nil {
		param = *e.Error.Param
	}
	return e.Error.Message, param, e.Error.Code
}

// TestBadRequestsSayWhatToChange: malformed requests are refused with a
// message in the wire format's words, naming the field, never Go's.
func TestBadRequestsSayWhatToChange(t *testing.T) {
	noLeaks(t)
	r := newRig(t)
	cases := []struct {
		name, path, body string
		param, code      string
		says             string
	}{
		{"array body", "/v1/completions", `[]`, "", "invalid_json", "must be a JSON object, not an array"},
		{"string body", "/v1/completions", `"hello"`, "", "invalid_json", "must be a JSON object, not a string"},
		{"broken JSON", "/v1/completions", `{"model": "m",`, "", "invalid_json", "not valid JSON"},
		{"model a number", "/v1/completions", `{"model": 7, "prompt": "p"}`, "model", "invalid_value", "model must be a string"},
		{"negative temperature", "/v1/completions", `{"model": "m", "prompt": "p", "temperature": -1}`, "temperature", "invalid_value", "temperature must be at least 0, got -1"},
		{"stream_options an array", "/v1/completions", `{"model": "m", "prompt": "p", "stream_options": []}`, "stream_options", "invalid_value", "stream_options must be an object, not an array"},
		{"messages an object", "/v1/chat/completions", `{"model": "m", "messages": {"role": "user"}}`, "messages", "invalid_value", "messages must be an array, not an object"},
		{"prompt item an object", "/v1/completions", `{"model": "m", "prompt": ["a", {"x": 1}]}`, "prompt", "invalid_value", "prompt[1] must be a string or an array of token ids"},
		{"token ids not integers", "/v1/completions", `{"model": "m", "prompt": [[1, "a"]]}`, "prompt", "invalid_value", "token ids must be whole numbers"},
		{"top_p above 1", "/v1/completions", `{"model": "m", "prompt": "p", "top_p": 2}`, "top_p", "invalid_value", "top_p must be between 0 and 1, got 2"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got := r.post(c.path, c.body)
			require.Equal(t, http.StatusBadRequest, got.status, "%s", got.body)
			msg, param, code := errorOf(t, got)
			assert.Equal(t, c.code, code)
			assert.Equal(t, c.param, param)
			assert.Contains(t, msg, c.says)
			assert.NotRegexp(t, goInternals, msg)
		})
	}
	assert.Zero(t, r.upstreamGenerations(), "nothing is sent upstream")
}

// TestLogprobsRangeCheckedByTheProxy: a log-probability depth past what the
// upstream serves is refused by the proxy, naming the field and the
// range, before anything is sent.
func TestLogprobsRangeCheckedByTheProxy(t *testing.T) {
	noLeaks(t)
	r := newRig(t)
	cases := []struct {
		name, path string
		body       map[string]any
		param      string
	}{
		{"completions logprobs", "/v1/completions", greedy("p", "logprobs", 1000), "logprobs"},
		{"chat top_logprobs", "/v1/chat/completions", map[string]any{"model": model, "temperature": 0, "logprobs": true, "top_logprobs": 21,
			"messages": []map[string]string{{"role": "user", "content": "hi"}}}, "top_logprobs"},
		{"negative", "/v1/completions", greedy("p", "logprobs", -1), "logprobs"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got := r.post(c.path, c.body)
			require.Equal(t, http.StatusBadRequest, got.status, "%s", got.body)
			msg, param, code := errorOf(t, got)
			assert.Equal(t, "invalid_value", code)
			assert.Equal(t, c.param, param)
			assert.Contains(t, msg, "between 0 and 20")
		})
	}
	assert.Zero(t, r.upstreamGenerations(), "nothing is sent upstream")
	// Within the range it goes on.
	ok := r.complete(greedy("p", "logprobs", 20))
	assert.Equal(t, http.StatusOK, ok.status, "%s", ok.body)
	// An upstream's own MaxLogprobs sets the range.
	narrow := newRig(t, func(o *proxy.Options) { o.Upstreams[0].MaxLogprobs = 5 })
	assert.Equal(t, http.StatusOK, narrow.complete(greedy("p", "logprobs", 5)).status)
	refused := narrow.complete(greedy("p", "logprobs", 6))
	assert.Equal(t, http.StatusBadRequest, refused.status)
	msg, _, _ := errorOf(t, refused)
	assert.Contains(t, msg, "between 0 and 5")
	assert.Equal(t, 1, narrow.upstreamGenerations())
}

// TestWrongMethodIs405: a known path asked with another method answers 405
// with Allow (RFC 9110 §15.5.6), in the wire format's error body; an
// unknown path stays 404.
func TestWrongMethodIs405(t *testing.T) {
	noLeaks(t)
	r := newRunRig(t)
	cases := []struct {
		method, path string
		status       int
		allow        string
	}{
		{"GET", "/v1/completions", 405, "POST"},
		{"PUT", "/v1/chat/completions", 405, "POST"},
		{"POST", "/v1/models", 405, "GET, HEAD"},
		{"DELETE", "/healthz", 405, "GET, HEAD"},
		{"PUT", "/stint/runs", 405, "GET, HEAD"},
		{"POST", "/stint/runs/r1", 405, "GET, HEAD, DELETE"},
		{"GET", "/v2/completions", 404, ""},
	}
	for _, c := range cases {
		t.Run(c.method+" "+c.path, func(t *testing.T) {
			req, err := http.NewRequestWithContext(t.Context(), c.method, r.srv.URL+c.path, nil)
			require.NoError(t, err)
			req.Header.Set("Authorization", "Bearer "+r.key)
			resp, err := http.DefaultClient.Do(req)
			require.NoError(t, err)
			defer resp.Body.Close()
			assert.Equal(t, c.status, resp.StatusCode)
			assert.Equal(t, c.allow, resp.Header.Get("Allow"))
			var e struct {
				Error struct {
					Code string `json:"code"`
				} `json:"error"`
			}
			require.NoError(t, json.NewDecoder(resp.Body).Decode(&e))
			want := "unknown_url"
			if c.status == 405 {
				want = "method_not_allowed"
			}
			assert.Equal(t, want, e.Error.Code)
		})
	}
}

// TestUnreachableUpstreamNamedOnce: a 502 names the upstream's address
// once and says what failed.
func TestUnreachableUpstreamNamedOnce(t *testing.T) {
	noLeaks(t)
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	addr := ln.Addr().String()
	require.NoError(t, ln.Close()) // nothing listens there now
	r := newRig(t, func(o *proxy.Options) {
		o.Upstreams = []proxy.Upstream{{Name: "gone", BaseURL: "http://" + addr + "/v1", Timeout: 5 * time.Second}}
	})
	got := r.complete(greedy("anyone there?"))
	require.Equal(t, http.StatusBadGateway, got.status, "%s", got.body)
	msg, _, code := errorOf(t, got)
	assert.Equal(t, "upstream_unreachable", code)
	assert.Equal(t, 1, strings.Count(msg, addr), "the address once: %q", msg)
	assert.Contains(t, msg, "connection refused")
	assert.Contains(t, msg, `upstream "gone"`)
}
