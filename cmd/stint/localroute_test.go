package main

import (
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
)

// TestLocalUpstreamServesOnlyItsModel: without a config, a proxy in front
// of local: answers the local model's name and refuses any other with the
// routing error, instead of answering every name as the local model; and
// it checks log-probability depths against the model's vocabulary.
func TestLocalUpstreamServesOnlyItsModel(t *testing.T) {
	cfg, err := resolveConfig(serveFlags{upstream: "local:" + modeltest.Path(t), data: t.TempDir(), listen: "127.0.0.1:0"})
	require.NoError(t, err)
	srv, err := buildServer(t.Context(), cfg, slog.New(slog.DiscardHandler), nil)
	require.NoError(t, err)
	t.Cleanup(func() { _ = srv.close() })
	ts := httptest.NewServer(srv.proxy)
	t.Cleanup(ts.Close)
	post := func(body string) (int, string, string) {
		resp, err := http.Post(ts.URL+"/v1/completions", "application/json", strings.NewReader(body))
		require.NoError(t, err)
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		var e struct {
			Error struct {
				Message, Code string
			} `json:"error"`
		}
		_ = json.Unmarshal(b, &e)
		return resp.StatusCode, e.Error.Code, e.Error.Message
	}
	status, _, msg := post(`{"model":"` + localmodel.DefaultName + `","prompt":"Once","max_tokens":2,"temperature":0}`)
	assert.Equal(t, http.StatusOK, status, msg)
	status, code, msg := post(`{"model":"gpt-big","prompt":"Once","max_tokens":2,"temperature":0}`)
	assert.Equal(t, http.StatusBadRequest, status)
	assert.Equal(t, "model_not_routed", code)
	assert.Contains(t, msg, `"gpt-big"`)
	assert.Contains(t, msg, localmodel.DefaultName, "the message names the model that is served")
	status, code, msg = post(`{"model":"` + localmodel.DefaultName + `","prompt":"Once","max_tokens":1,"temperature":0,"logprobs":600}`)
	assert.Equal(t, http.StatusBadRequest, status)
	assert.Equal(t, "invalid_value", code)
	assert.Contains(t, msg, "between 0 and 512")
}
