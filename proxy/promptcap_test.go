package proxy_test

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

// promptsBody is a greedy completions request with n prompts.
func promptsBody(t *testing.T, n int) []byte {
	t.Helper()
	prompts := make([]string, n)
	for i := range prompts {
		prompts[i] = "crate " + strings.Repeat("x", i%7)
	}
	b, err := json.Marshal(map[string]any{"model": "quill-small", "prompt": prompts, "temperature": 0, "max_tokens": 1})
	require.NoError(t, err)
	return b
}

func TestPromptArraysAreCapped(t *testing.T) {
	noLeaks(t)
	tokenIDs := make([]int, 5000) // one prompt, however long
	oneLong, _ := json.Marshal(map[string]any{"model": "quill-small", "prompt": tokenIDs, "temperature": 0, "max_tokens": 1})
	tests := []struct {
		name   string
		cap    int // Options.MaxPrompts
		body   []byte
		status int
	}{
		{"at the cap", 4, promptsBody(t, 4), http.StatusOK},
		{"one over the cap", 4, promptsBody(t, 5), http.StatusBadRequest},
		{"the default cap", 0, promptsBody(t, proxy.DefaultMaxPrompts+1), http.StatusBadRequest},
		{"a huge batch", 0, promptsBody(t, 200_000), http.StatusBadRequest},
		{"a long token-id prompt is one prompt", 4, oneLong, http.StatusOK},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r := newRig(t, func(o *proxy.Options) {
				o.MaxPrompts = tt.cap
				o.MaxBodyBytes = 8 << 20
			})
			got := r.complete(tt.body)
			require.Equal(t, tt.status, got.status, "%.300s", got.body)
			if tt.status != http.StatusBadRequest {
				return
			}
			var e struct {
				Error struct {
					Code  string `json:"code"`
					Param string `json:"param"`
				} `json:"error"`
			}
			require.NoError(t, json.Unmarshal(got.body, &e))
			assert.Equal(t, "too_many_prompts", e.Error.Code)
			assert.Equal(t, "prompt", e.Error.Param)
			assert.Zero(t, r.upstreamGenerations(), "a refused batch reached the upstream")
			assert.Zero(t, r.metric("stint_prompts_total"), "prompts of a refused batch were looked up")
		})
	}
}
