package upstreamtest_test

import (
	"bytes"
	"encoding/json"
	"io"
	"math"
	"net/http"
	"testing"

	"github.com/stretchr/testify/assert"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/upstreamtest"
	"github.com/stintlab/stint/proxy/wire"
)

// errorEnvelope is an error answer as a client reads it: Error is nil
// when the answer has no error object.
type errorEnvelope struct {
	Error *wire.ErrorDetail `json:"error"`
}

// post sends body to path (below the /v1 base) and returns the response
// with its body read.
func post(tb testing.TB, up *upstreamtest.Server, path, body string, header http.Header) (*http.Response, []byte) {
	tb.Helper()
	req, err := http.NewRequest(http.MethodPost, up.URL()+path, bytes.NewReader([]byte(body)))
	require.NoError(tb, err)
	req.Header.Set("Content-Type", "application/json")
	for k, v := range header {
		req.Header[k] = v
	}
	resp, err := http.DefaultClient.Do(req)
	require.NoError(tb, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(tb, err, "reading %s answer", path)
	return resp, b
}

// postOK sends body and decodes a 200 answer into v.
func postOK(tb testing.TB, up *upstreamtest.Server, path, body string, v any) {
	tb.Helper()
	resp, b := post(tb, up, path, body, nil)
	require.Equal(tb, http.StatusOK, resp.StatusCode, "POST %s %s: body %s", path, body, b)
	require.NoError(tb, json.Unmarshal(b, v), "decoding %s", b)
}

// streamEvents parses an event-stream answer into its data payloads,
// which must end with [DONE].
func streamEvents(tb testing.TB, body []byte) [][]byte {
	tb.Helper()
	r := sse.NewReader(bytes.NewReader(body))
	var out [][]byte
	for {
		ev, err := r.Next()
		require.NoError(tb, err, "stream ended without [DONE]")
		if ev.IsDone() {
			break
		}
		out = append(out, []byte(ev.Data))
	}
	if _, err := r.Next(); err != io.EOF {
		require.Failf(tb, "events after [DONE]", "after [DONE]: %v; want io.EOF", err)
	}
	return out
}

// checkLogprobs checks the invariants of a completions logprobs object
// against its choice text: tokens concatenate to text, offsets count from
// the start of the text, exactly k top entries with probabilities summing
// to at most one, and (greedy) the chosen token is the most likely.
func checkLogprobs(tb testing.TB, text string, lp *wire.CompletionLogprobs, k int, greedy bool, base int) {
	tb.Helper()
	require.NotNil(tb, lp, "logprobs = null; want an object")
	n := len(lp.Tokens)
	require.Len(tb, lp.TokenLogprobs, n, "logprobs lists have lengths %d/%d/%d/%d; want all equal", n, len(lp.TokenLogprobs), len(lp.TopLogprobs), len(lp.TextOffset))
	require.Len(tb, lp.TopLogprobs, n, "logprobs lists have lengths %d/%d/%d/%d; want all equal", n, len(lp.TokenLogprobs), len(lp.TopLogprobs), len(lp.TextOffset))
	require.Len(tb, lp.TextOffset, n, "logprobs lists have lengths %d/%d/%d/%d; want all equal", n, len(lp.TokenLogprobs), len(lp.TopLogprobs), len(lp.TextOffset))
	joined, off := "", base
	for i, tok := range lp.Tokens {
		assert.Equal(tb, off, lp.TextOffset[i], "text_offset[%d] = %d; want %d", i, lp.TextOffset[i], off)
		joined += tok
		off += len(tok)
		if lp.TokenLogprobs[i] == nil {
			assert.False(tb, i != 0 || lp.TopLogprobs[i] != nil, "token %d %q has a null logprob; only the first echoed token may", i, tok)
			continue
		}
		assert.False(tb, *lp.TokenLogprobs[i] >= 0, "token_logprobs[%d] = %v; want < 0", i, *lp.TokenLogprobs[i])
		top := lp.TopLogprobs[i].Map()
		assert.Len(tb, top, k, "top_logprobs[%d] has %d entries; want %d", i, len(top), k)
		var mass float64
		best, bestLP := "", -1e300
		for t, v := range top {
			mass += exp(v)
			if v > bestLP {
				best, bestLP = t, v
			}
		}
		assert.False(tb, mass > 1, "top_logprobs[%d] probabilities sum to %v; want <= 1", i, mass)
		assert.False(tb, greedy && k > 0 && (best != tok || bestLP != *lp.TokenLogprobs[i]), "greedy token %d = %q (%v); most likely top entry %q (%v)", i, tok, *lp.TokenLogprobs[i], best, bestLP)
	}
	assert.Equal(tb, text, joined, "tokens join to %q; want the text %q", joined, text)
}

func exp(x float64) float64 { return math.Exp(x) }
