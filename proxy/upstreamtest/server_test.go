package upstreamtest_test

import (
	"context"
	"encoding/base64"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/require"

	"github.com/stretchr/testify/assert"

	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/upstreamtest"
	"github.com/stintlab/stint/proxy/wire"
)

func TestValidation(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const c, ch = "/completions", "/chat/completions"
	tests := []struct {
		name       string
		path, body string
		status     int
		param      string // "" for null
		code       string // "" for null
	}{
		{"bad JSON", c, `{"model":`, 400, "", ""},
		{"not an object", c, `["quill-small"]`, 400, "", ""},
		{"missing model", c, `{"prompt":"hi"}`, 400, "model", ""},
		{"unknown model", c, `{"model":"quill-huge","prompt":"hi"}`, 404, "", "model_not_found"},
		{"model of wrong type", c, `{"model":7,"prompt":"hi"}`, 400, "model", ""},
		{"max_tokens of wrong type", c, `{"model":"quill-small","prompt":"hi","max_tokens":"ten"}`, 400, "max_tokens", ""},
		{"negative max_tokens", c, `{"model":"quill-small","prompt":"hi","max_tokens":-1}`, 400, "max_tokens", "invalid_value"},
		{"max_tokens past the context", c, `{"model":"quill-small","prompt":"hi","max_tokens":1000000}`, 400, "max_tokens", "context_length_exceeded"},
		{"temperature out of range", c, `{"model":"quill-small","prompt":"hi","temperature":2.5}`, 400, "temperature", "invalid_value"},
		{"top_p out of range", c, `{"model":"quill-small","prompt":"hi","top_p":1.5}`, 400, "top_p", "invalid_value"},
		{"n zero", c, `{"model":"quill-small","prompt":"hi","n":0}`, 400, "n", "invalid_value"},
		{"logprobs over 20", c, `{"model":"quill-small","prompt":"hi","logprobs":21}`, 400, "logprobs", "invalid_value"},
		{"logprobs negative", c, `{"model":"quill-small","prompt":"hi","logprobs":-1}`, 400, "logprobs", "invalid_value"},
		{"logprobs of wrong type", c, `{"model":"quill-small","prompt":"hi","logprobs":true}`, 400, "logprobs", ""},
		{"echo of wrong type", c, `{"model":"quill-small","prompt":"hi","echo":"yes"}`, 400, "echo", ""},
		{"missing prompt", c, `{"model":"quill-small"}`, 400, "prompt", ""},
		{"empty prompt array", c, `{"model":"quill-small","prompt":[]}`, 400, "prompt", ""},
		{"mixed prompt array", c, `{"model":"quill-small","prompt":["a",1]}`, 400, "prompt", ""},
		{"empty token list", c, `{"model":"quill-small","prompt":[[]]}`, 400, "prompt", ""},
		{"token id out of range", c, `{"model":"quill-small","prompt":[1,99999]}`, 400, "prompt", ""},
		{"prompt of wrong type", c, `{"model":"quill-small","prompt":{"text":"hi"}}`, 400, "prompt", ""},
		{"stop of wrong type", c, `{"model":"quill-small","prompt":"hi","stop":7}`, 400, "stop", ""},
		{"too many stops", c, `{"model":"quill-small","prompt":"hi","stop":["a","b","c","d","e"]}`, 400, "stop", ""},
		{"stream_options without stream", c, `{"model":"quill-small","prompt":"hi","stream_options":{"include_usage":true}}`, 400, "stream_options", ""},
		{"chat without messages", ch, `{"model":"quill-small"}`, 400, "messages", ""},
		{"chat with empty messages", ch, `{"model":"quill-small","messages":[]}`, 400, "messages", ""},
		{"chat with an unknown role", ch, `{"model":"quill-small","messages":[{"role":"robot","content":"hi"}]}`, 400, "messages[0].role", ""},
		{"chat content of wrong type", ch, `{"model":"quill-small","messages":[{"role":"user","content":5}]}`, 400, "messages[0].content", ""},
		{"chat top_logprobs without logprobs", ch, `{"model":"quill-small","messages":[{"role":"user","content":"hi"}],"top_logprobs":2}`, 400, "top_logprobs", ""},
		{"chat top_logprobs over 20", ch, `{"model":"quill-small","messages":[{"role":"user","content":"hi"}],"logprobs":true,"top_logprobs":21}`, 400, "top_logprobs", "invalid_value"},
		{"chat max_tokens zero", ch, `{"model":"quill-small","messages":[{"role":"user","content":"hi"}],"max_tokens":0}`, 400, "max_tokens", "invalid_value"},
		{"chat unknown model", ch, `{"model":"quill-huge","messages":[{"role":"user","content":"hi"}]}`, 404, "", "model_not_found"},
		{"chat missing model", ch, `{"messages":[{"role":"user","content":"hi"}]}`, 400, "model", ""},
		{"unknown fields are accepted", c, `{"model":"quill-small","prompt":"hi","best_of":3,"frobnicate":{"x":[1]},"user":"u1"}`, 200, "", ""},
		{"chat unknown fields are accepted", ch, `{"model":"quill-small","messages":[{"role":"user","content":[{"type":"text","text":"hi"}]}],"tools":[],"user":"u1"}`, 200, "", ""},
		{"max_tokens zero is allowed", c, `{"model":"quill-small","prompt":"hi","max_tokens":0,"echo":true,"logprobs":1}`, 200, "", ""},
		{"null logprobs means none", c, `{"model":"quill-small","prompt":"hi","logprobs":null}`, 200, "", ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			resp, body := post(t, up, tt.path, tt.body, nil)
			require.Equal(t, tt.status, resp.StatusCode, "status = %d; want %d (body %s)", resp.StatusCode, tt.status, body)
			ct := resp.Header.Get("Content-Type")
			assert.Equal(t, "application/json", ct, "Content-Type = %q; want application/json", ct)
			assert.NotEqual(t, "", resp.Header.Get("x-request-id"), "no x-request-id header")
			if tt.status == 200 {
				return
			}
			var env errorEnvelope
			err := json.Unmarshal(body, &env)
			require.NoError(t, err, "error body %s does not have the error shape (%v)", body, err)
			require.NotNil(t, env.Error, "error body %s does not have the error shape (%v)", body, err)
			e := env.Error
			assert.NotEqual(t, "", e.Message, "error message %q, type %q; want a message and invalid_request_error", e.Message, e.Type)
			assert.Equal(t, "invalid_request_error", e.Type, "error message %q, type %q; want a message and invalid_request_error", e.Message, e.Type)
			got := deref(e.Param)
			assert.Equal(t, tt.param, got, "param = %q; want %q", got, tt.param)
			got = string(e.Code)
			assert.Equal(t, tt.code, got, "code = %q; want %q", got, tt.code)
		})
	}
	got := up.Prompts()
	assert.Equal(t, 4, got, "Prompts() = %d after four accepted requests; want 4 (refused ones count none)", got)
}

func deref(s *string) string {
	if s == nil {
		return ""
	}
	return *s
}

func TestRoutes(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	tests := []struct {
		method, path string
		status       int
	}{
		{"GET", "/completions", 405},
		{"GET", "/chat/completions", 405},
		{"POST", "/models", 405},
		{"GET", "/embeddings", 404},
		{"GET", "/models/quill-large", 200},
		{"GET", "/models/quill-huge", 404},
	}
	for _, tt := range tests {
		req, _ := http.NewRequest(tt.method, up.URL()+tt.path, nil)
		resp, err := http.DefaultClient.Do(req)
		require.NoError(t, err)
		resp.Body.Close()
		assert.Equal(t, tt.status, resp.StatusCode, "%s %s: status %d; want %d", tt.method, tt.path, resp.StatusCode, tt.status)
	}
	got, want := up.Calls(), (upstreamtest.Calls{Completions: 1, Chat: 1, Models: 3, Other: 1})
	assert.True(t, got == want, "Calls() = %+v; want %+v", got, want)
}

func TestModelsList(t *testing.T) {
	for _, tt := range []struct {
		opts upstreamtest.Options
		want []string
	}{
		{upstreamtest.Options{}, []string{upstreamtest.ModelSmall, upstreamtest.ModelLarge}},
		{upstreamtest.Options{Models: []string{"heron-1"}}, []string{"heron-1"}},
	} {
		up := upstreamtest.New(tt.opts)
		resp, err := http.Get(up.URL() + "/models")
		require.NoError(t, err)
		var list struct {
			Object string `json:"object"`
			Data   []struct {
				ID     string `json:"id"`
				Object string `json:"object"`
			} `json:"data"`
		}
		err = json.NewDecoder(resp.Body).Decode(&list)
		resp.Body.Close()
		up.Close()
		require.NoError(t, err)
		var got []string
		for _, m := range list.Data {
			got = append(got, m.ID)
			assert.Equal(t, "model", m.Object, "model object = %q; want model", m.Object)
		}
		assert.Equal(t, "list", list.Object, "models = %q (%s); want %q (list)", got, list.Object, tt.want)
		assert.True(t, slices.Equal(got, tt.want), "models = %q (%s); want %q (list)", got, list.Object, tt.want)
	}
}

func TestAuth(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{Key: "up-secret"})
	defer up.Close()
	body := `{"model":"quill-small","prompt":"hi","max_tokens":2}`
	tests := []struct {
		auth   string
		status int
	}{
		{"", 401},
		{"Bearer client-key", 401},
		{"up-secret", 401},
		{"Bearer up-secret", 200},
	}
	for _, tt := range tests {
		h := http.Header{}
		if tt.auth != "" {
			h.Set("Authorization", tt.auth)
		}
		resp, b := post(t, up, "/completions", body, h)
		assert.Equal(t, tt.status, resp.StatusCode, "Authorization %q: status %d; want %d", tt.auth, resp.StatusCode, tt.status)
		if tt.status == 401 {
			var env errorEnvelope
			if assert.NoError(t, json.Unmarshal(b, &env), "401 body %s; want code invalid_api_key", b) {
				if assert.NotNil(t, env.Error, "401 body %s; want code invalid_api_key", b) {
					assert.Equal(t, "invalid_api_key", string(env.Error.Code), "401 body %s; want code invalid_api_key", b)
				}
			}
		}
	}
	got := up.Calls().Completions
	assert.Equal(t, 4, got, "Calls().Completions = %d; want 4 (refused calls reached it too)", got)
	got = up.Prompts()
	assert.Equal(t, 1, got, "Prompts() = %d; want 1", got)
}

func TestCountersRequestsReset(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	var out wire.CompletionResponse
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":["a","b","c"],"max_tokens":1,"n":2}`, &out)
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":[[1,2],[3]],"max_tokens":1}`, &out)
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":[1,2,3],"max_tokens":1}`, &out)
	var chat wire.ChatResponse
	h := http.Header{"Authorization": {"Bearer team-key"}, "X-Trace": {"t1"}}
	resp, _ := post(t, up, "/chat/completions", `{"model":"quill-small","messages":[{"role":"user","content":"hi"}],"max_tokens":1}`, h)
	require.Equal(t, 200, resp.StatusCode, "chat status %d", resp.StatusCode)
	_ = chat
	got, want := up.Calls(), (upstreamtest.Calls{Completions: 3, Chat: 1})
	assert.True(t, got == want, "Calls() = %+v; want %+v", got, want)
	assert.Equal(t, 4, up.Calls().Total(), "Calls().Total()")
	// 3 + 2 + 1 prompts, and the chat call counts one.
	assert.Equal(t, 7, up.Prompts(), "Prompts()")
	reqs := up.Requests()
	require.Len(t, reqs, 4, "Requests() has %d entries; want 4", len(reqs))
	last := reqs[3]
	assert.Equal(t, "POST", last.Method, "last request = %s %s %v; want POST %s with its headers", last.Method, last.Path, last.Header, upstreamtest.PathChat)
	assert.Equal(t, upstreamtest.PathChat, last.Path, "last request = %s %s %v; want POST %s with its headers", last.Method, last.Path, last.Header, upstreamtest.PathChat)
	assert.Equal(t, "Bearer team-key", last.Header.Get("Authorization"), "last request = %s %s %v; want POST %s with its headers", last.Method, last.Path, last.Header, upstreamtest.PathChat)
	assert.Equal(t, "t1", last.Header.Get("X-Trace"), "last request = %s %s %v; want POST %s with its headers", last.Method, last.Path, last.Header, upstreamtest.PathChat)
	assert.Contains(t, string(last.Body), `"messages"`, "last body = %s; want the chat body", last.Body)
	// Copies: changing them does not change what the server holds.
	last.Body[0] = 'X'
	last.Header.Set("Authorization", "changed")
	again := up.Requests()[3]
	assert.Equal(t, byte('{'), again.Body[0], "Requests() returned the server's own slices or headers, not copies")
	assert.Equal(t, "Bearer team-key", again.Header.Get("Authorization"), "Requests() returned the server's own slices or headers, not copies")
	up.Reset()
	got = up.Calls()
	assert.True(t, got == (upstreamtest.Calls{}), "after Reset, Calls() = %+v; want zero", got)
	assert.Equal(t, 0, up.Prompts(), "after Reset, Prompts() = %d, %d requests; want 0, 0", up.Prompts(), len(up.Requests()))
	assert.Len(t, up.Requests(), 0, "after Reset, Prompts() = %d, %d requests; want 0, 0", up.Prompts(), len(up.Requests()))
}

func TestCompletionsGreedyAndLogprobs(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const prompt = "The skipper moors the barge at dusk"
	req := func(maxTokens, k int, echo bool) string {
		return fmt.Sprintf(`{"model":"quill-large","prompt":%q,"max_tokens":%d,"temperature":0,"logprobs":%d,"echo":%v}`, prompt, maxTokens, k, echo)
	}
	var long wire.CompletionResponse
	postOK(t, up, "/completions", req(40, 5, false), &long)
	assert.Equal(t, "text_completion", long.Object, "envelope = %q %q %q %d", long.Object, long.ID, long.Model, long.Created)
	assert.True(t, strings.HasPrefix(long.ID, "cmpl-"), "envelope = %q %q %q %d", long.Object, long.ID, long.Model, long.Created)
	assert.Equal(t, "quill-large", long.Model, "envelope = %q %q %q %d", long.Object, long.ID, long.Model, long.Created)
	assert.NotEqual(t, int64(0), long.Created, "envelope = %q %q %q %d", long.Object, long.ID, long.Model, long.Created)
	lc := long.Choices[0]
	checkLogprobs(t, lc.Text, lc.Logprobs, 5, true, 0)
	got, want := *long.Usage, (wire.Usage{PromptTokens: 7, CompletionTokens: len(lc.Logprobs.Tokens), TotalTokens: 7 + len(lc.Logprobs.Tokens)})
	assert.True(t, got == want, "usage = %+v; want %+v", got, want)
	// Same prompt, same answer; fewer tokens give a prefix.
	for _, n := range []int{0, 1, 5, 16} {
		var short wire.CompletionResponse
		postOK(t, up, "/completions", req(n, 3, false), &short)
		sc := short.Choices[0]
		checkLogprobs(t, sc.Text, sc.Logprobs, 3, true, 0)
		wantToks := lc.Logprobs.Tokens[:min(n, len(lc.Logprobs.Tokens))]
		assert.True(t, slices.Equal(sc.Logprobs.Tokens, wantToks), "max_tokens %d: tokens %q; want the first %d of %q", n, sc.Logprobs.Tokens, n, lc.Logprobs.Tokens)
		if n < len(lc.Logprobs.Tokens) {
			assert.Equal(t, "length", *sc.FinishReason, "max_tokens %d: finish_reason", n)
		}
	}
	// Echo: the prompt's tokens first, the first without a log-probability,
	// offsets counted from the start of the prompt.
	var echoed wire.CompletionResponse
	postOK(t, up, "/completions", req(4, 2, true), &echoed)
	ec := echoed.Choices[0]
	checkLogprobs(t, ec.Text, ec.Logprobs, 2, false, 0)
	assert.Equal(t, prompt+strings.Join(lc.Logprobs.Tokens[:4], ""), ec.Text, "echoed text: want the prompt then the first 4 tokens")
	assert.Nil(t, ec.Logprobs.TokenLogprobs[0], "echo: first logprob, want null")
	assert.Len(t, ec.Logprobs.Tokens, 7+4, "echo tokens %q, want 11", ec.Logprobs.Tokens)
	assert.Equal(t, 4, echoed.Usage.CompletionTokens, "echo usage = %+v; want 7 prompt and 4 completion tokens", *echoed.Usage)
	assert.Equal(t, 7, echoed.Usage.PromptTokens, "echo usage = %+v; want 7 prompt and 4 completion tokens", *echoed.Usage)
	// Without logprobs the field is null.
	var plain wire.CompletionResponse
	resp, b := post(t, up, "/completions", fmt.Sprintf(`{"model":"quill-large","prompt":%q,"temperature":0}`, prompt), nil)
	assert.Equal(t, 200, resp.StatusCode, "answer without logprobs: %d %s; want logprobs null", resp.StatusCode, b)
	assert.Contains(t, string(b), `"logprobs":null`, "answer without logprobs: %d %s; want logprobs null", resp.StatusCode, b)
	json.Unmarshal(b, &plain)
	assert.Equal(t, strings.Join(lc.Logprobs.Tokens[:min(16, len(lc.Logprobs.Tokens))], ""), plain.Choices[0].Text, "default max_tokens answer: want the first 16 tokens")
}

func TestModelsDiffer(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	var a, b wire.CompletionResponse
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":"hive","max_tokens":30,"temperature":0}`, &a)
	postOK(t, up, "/completions", `{"model":"quill-large","prompt":"hive","max_tokens":30,"temperature":0}`, &b)
	assert.NotEqual(t, b.Choices[0].Text, a.Choices[0].Text, "both models answered %q; want different answers", a.Choices[0].Text)
}

func TestArrayPromptsAndIndexes(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	prompts := []string{"The queen", "Three jars of heather honey", "fog on the river"}
	single := make([]string, len(prompts))
	promptTokens := 0
	for i, p := range prompts {
		var c wire.CompletionResponse
		postOK(t, up, "/completions", fmt.Sprintf(`{"model":"quill-small","prompt":%q,"max_tokens":6,"temperature":0}`, p), &c)
		single[i] = c.Choices[0].Text
		promptTokens += c.Usage.PromptTokens
	}
	pj, _ := json.Marshal(prompts)
	var batch wire.CompletionResponse
	postOK(t, up, "/completions", fmt.Sprintf(`{"model":"quill-small","prompt":%s,"max_tokens":6,"temperature":0,"n":2,"logprobs":1}`, pj), &batch)
	require.Len(t, batch.Choices, 6, "%d choices; want 3 prompts x n=2", len(batch.Choices))
	completionTokens := 0
	for i, c := range batch.Choices {
		assert.Equal(t, i, c.Index, "choice %d has index %d", i, c.Index)
		want := single[c.Index/2]
		assert.Equal(t, want, c.Text, "choice %d (prompt %d) = %q; want %q", c.Index, c.Index/2, c.Text, want)
		completionTokens += len(c.Logprobs.Tokens)
	}
	got, want := *batch.Usage, wire.NewUsage(promptTokens, completionTokens)
	assert.True(t, got == want, "usage = %+v; want %+v (prompt tokens once per prompt)", got, want)
}

func TestTokenIDPrompts(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	// Read the tokens back from an echo to learn ids' text: ids 24 and 56
	// are " barge" and " hive" in the vocabulary.
	var ids, text wire.CompletionResponse
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":[24,56],"max_tokens":5,"temperature":0,"echo":true}`, &ids)
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":" barge hive","max_tokens":5,"temperature":0,"echo":true}`, &text)
	assert.False(t, ids.Choices[0].Text != text.Choices[0].Text || !strings.HasPrefix(ids.Choices[0].Text, " barge hive"), "token-id prompt answered %q; string prompt %q; want the same, starting with the prompt", ids.Choices[0].Text, text.Choices[0].Text)
	assert.Equal(t, 2, ids.Usage.PromptTokens, "prompt_tokens = %d; want 2", ids.Usage.PromptTokens)
	var lists wire.CompletionResponse
	postOK(t, up, "/completions", `{"model":"quill-small","prompt":[[24,56],[24]],"max_tokens":5,"temperature":0}`, &lists)
	if assert.Len(t, lists.Choices, 2, "array of token lists: %d choices, %d prompt tokens; want 2, 3", len(lists.Choices), lists.Usage.PromptTokens) {
		assert.Equal(t, 3, lists.Usage.PromptTokens, "array of token lists: %d choices, %d prompt tokens; want 2, 3", len(lists.Choices), lists.Usage.PromptTokens)
	}
}

func TestStopSequences(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const body = `{"model":"quill-small","prompt":"Before dawn the crew","max_tokens":20,"temperature":0,"logprobs":0%s}`
	var full wire.CompletionResponse
	postOK(t, up, "/completions", fmt.Sprintf(body, ""), &full)
	toks := full.Choices[0].Logprobs.Tokens
	require.GreaterOrEqual(t, len(toks), 6, "answer %q too short for the test", toks)
	tests := []struct {
		name string
		stop string
		keep int // tokens kept
	}{
		{"whole token", toks[4], 4},
		{"inside a token", toks[3][2:], 3},
		{"across tokens", toks[2] + toks[3], 2},
	}
	for _, tt := range tests {
		stop, _ := json.Marshal([]string{"zzz", tt.stop})
		var got wire.CompletionResponse
		postOK(t, up, "/completions", fmt.Sprintf(body, `,"stop":`+string(stop)), &got)
		c := got.Choices[0]
		want := strings.Join(toks[:tt.keep], "")
		require.GreaterOrEqual(t, strings.Index(strings.Join(toks, ""), tt.stop), len(want), "%s: stop %q occurs earlier in %q; the test needs another prompt", tt.name, tt.stop, toks)
		assert.False(t, c.Text != want || *c.FinishReason != "stop", "%s: stop %q gave %q (%s); want %q (stop)", tt.name, tt.stop, c.Text, *c.FinishReason, want)
		checkLogprobs(t, c.Text, c.Logprobs, 0, true, 0)
	}
	var one wire.CompletionResponse
	postOK(t, up, "/completions", fmt.Sprintf(body, fmt.Sprintf(`,"stop":%q`, toks[1])), &one)
	assert.False(t, strings.Contains(one.Choices[0].Text, toks[1]) || *one.Choices[0].FinishReason != "stop", "stop as a string: %q (%s); want no %q and stop", one.Choices[0].Text, *one.Choices[0].FinishReason, toks[1])
}

func TestEndsOnItsOwn(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	stops := 0
	for i := range 40 {
		var c wire.CompletionResponse
		postOK(t, up, "/completions", fmt.Sprintf(`{"model":"quill-small","prompt":"jar %d","max_tokens":16,"temperature":0,"logprobs":0}`, i), &c)
		ch := c.Choices[0]
		switch *ch.FinishReason {
		case "stop":
			stops++
			n := len(ch.Logprobs.Tokens)
			assert.Contains(t, []string{".", "!", "?"}, ch.Logprobs.Tokens[n-1], "stopped after a token that ends no sentence")
		case "length":
			assert.Len(t, ch.Logprobs.Tokens, 16, "length with %d tokens", len(ch.Logprobs.Tokens))
		default:
			assert.Failf(t, "unexpected finish_reason", "finish_reason %q", *ch.FinishReason)
		}
	}
	assert.NotEqual(t, 0, stops, "%d of 40 answers ended on their own; want some but not all", stops)
	assert.NotEqual(t, 40, stops, "%d of 40 answers ended on their own; want some but not all", stops)
}

func TestSampling(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	text := func(extra string) []string {
		var c wire.CompletionResponse
		postOK(t, up, "/completions", `{"model":"quill-small","prompt":"The swarm","max_tokens":32,"n":3`+extra+`}`, &c)
		var out []string
		for _, ch := range c.Choices {
			out = append(out, ch.Text)
		}
		return out
	}
	a, b := text(`,"temperature":1`), text("") // the default temperature is 1
	assert.False(t, slices.Equal(a, b), "two unseeded sampled calls both answered %q; want them to differ", a)
	assert.False(t, a[0] == a[1] && a[1] == a[2], "n=3 sampled choices are all %q; want them to differ", a[0])
	s1, s2, s3 := text(`,"temperature":0.8,"seed":7`), text(`,"temperature":0.8,"seed":7`), text(`,"temperature":0.8,"seed":8`)
	assert.True(t, slices.Equal(s1, s2), "seed 7 answered %q, then %q; want the same", s1, s2)
	assert.False(t, slices.Equal(s1, s3), "seeds 7 and 8 both answered %q; want them to differ", s1)
	g1, g2 := text(`,"temperature":0`), text(`,"temperature":0,"seed":99`)
	assert.False(t, !slices.Equal(g1, g2) || g1[0] != g1[1], "greedy answers %q and %q; want all equal", g1, g2)
}

// assembled is a streamed choice put back together.
type assembled struct {
	text   string
	lp     wire.CompletionLogprobs
	finish string
}

func TestCompletionStreamMatchesAnswer(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const base = `{"model":"quill-small","prompt":["The ferry","Dusk over the weir"],"max_tokens":7,"temperature":0,"n":2,"logprobs":3,"echo":true`
	var whole wire.CompletionResponse
	postOK(t, up, "/completions", base+`}`, &whole)

	resp, body := post(t, up, "/completions", base+`,"stream":true,"stream_options":{"include_usage":true}}`, nil)
	ct := resp.Header.Get("Content-Type")
	require.True(t, strings.HasPrefix(ct, "text/event-stream"), "Content-Type = %q; want text/event-stream", ct)
	events := streamEvents(t, body)
	got := map[int]*assembled{}
	var streamUsage *wire.Usage
	for i, data := range events {
		var c wire.CompletionResponse
		require.NoError(t, json.Unmarshal(data, &c), "event %d %s", i, data)
		assert.Equal(t, "text_completion", c.Object, "event %d object %q", i, c.Object)
		if c.Usage != nil {
			if assert.Equal(t, len(events)-1, i, "usage in event %d of %d with %d choices; want only the last, with none", i, len(events), len(c.Choices)) {
				assert.Len(t, c.Choices, 0, "usage in event %d of %d with %d choices; want only the last, with none", i, len(events), len(c.Choices))
			}
			streamUsage = c.Usage
			continue
		}
		require.Len(t, c.Choices, 1, "event %d has %d choices; want 1", i, len(c.Choices))
		ch := c.Choices[0]
		a := got[ch.Index]
		if a == nil {
			a = &assembled{}
			got[ch.Index] = a
		}
		assert.Equal(t, "", a.finish, "choice %d has a chunk after its finish_reason", ch.Index)
		require.NotNil(t, ch.Logprobs, "event %d: logprobs null", i)
		for j, off := range ch.Logprobs.TextOffset {
			assert.Equal(t, len(a.text)+len(strings.Join(ch.Logprobs.Tokens[:j], "")), off, "choice %d: chunk offset %d does not continue the text so far (%d bytes)", ch.Index, off, len(a.text))
		}
		a.text += ch.Text
		a.lp.Tokens = append(a.lp.Tokens, ch.Logprobs.Tokens...)
		a.lp.TokenLogprobs = append(a.lp.TokenLogprobs, ch.Logprobs.TokenLogprobs...)
		a.lp.TopLogprobs = append(a.lp.TopLogprobs, ch.Logprobs.TopLogprobs...)
		a.lp.TextOffset = append(a.lp.TextOffset, ch.Logprobs.TextOffset...)
		if ch.FinishReason != nil {
			a.finish = *ch.FinishReason
		}
	}
	require.Len(t, got, len(whole.Choices), "stream has %d choices; want %d", len(got), len(whole.Choices))
	for _, w := range whole.Choices {
		a := got[w.Index]
		assert.False(t, a.text != w.Text || a.finish != *w.FinishReason, "choice %d streamed %q (%s); answered %q (%s)", w.Index, a.text, a.finish, w.Text, *w.FinishReason)
		wl, _ := json.Marshal(w.Logprobs)
		al, _ := json.Marshal(a.lp)
		assert.Equal(t, string(al), string(wl), "choice %d streamed logprobs %s; answered %s", w.Index, al, wl)
	}
	if assert.NotNil(t, streamUsage, "stream usage %+v; want %+v", streamUsage, *whole.Usage) {
		assert.True(t, *streamUsage == *whole.Usage, "stream usage %+v; want %+v", streamUsage, *whole.Usage)
	}

	// Without include_usage there is no usage chunk.
	_, body = post(t, up, "/completions", base+`,"stream":true}`, nil)
	for _, data := range streamEvents(t, body) {
		var c wire.CompletionResponse
		json.Unmarshal(data, &c)
		if assert.Nil(t, c.Usage, "event %s without include_usage; want one choice and no usage", data) {
			assert.Len(t, c.Choices, 1, "event %s without include_usage; want one choice and no usage", data)
		}
	}
}

func TestChat(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const base = `{"model":"quill-large","messages":[{"role":"system","content":"You keep bees."},{"role":"user","content":"Where is the barge?"}],"temperature":0,"logprobs":true,"top_logprobs":4`
	var long, short wire.ChatResponse
	postOK(t, up, "/chat/completions", base+`,"max_completion_tokens":12}`, &long)
	postOK(t, up, "/chat/completions", base+`,"max_tokens":5}`, &short)
	assert.Equal(t, "chat.completion", long.Object, "envelope %q %q", long.Object, long.ID)
	assert.True(t, strings.HasPrefix(long.ID, "chatcmpl-"), "envelope %q %q", long.Object, long.ID)
	lc := long.Choices[0]
	require.NotNil(t, lc.Message, "message = %+v; want an assistant message", lc.Message)
	require.Equal(t, "assistant", lc.Message.Role, "message = %+v; want an assistant message", lc.Message)
	var joined string
	for i, tl := range lc.Logprobs.Content {
		joined += tl.Token
		assert.Equal(t, tl.Token, string(bytesOf(tl.Bytes)), "token %d bytes %v; want the bytes of %q", i, tl.Bytes, tl.Token)
		require.Len(t, tl.TopLogprobs, 4, "token %d has %d top_logprobs; want 4", i, len(tl.TopLogprobs))
		assert.False(t, tl.TopLogprobs[0].Token != tl.Token || tl.TopLogprobs[0].Logprob != tl.Logprob || tl.Logprob >= 0, "greedy token %q (%v); most likely %q (%v)", tl.Token, tl.Logprob, tl.TopLogprobs[0].Token, tl.TopLogprobs[0].Logprob)
		var mass float64
		for j, top := range tl.TopLogprobs {
			mass += exp(top.Logprob)
			assert.False(t, j > 0 && top.Logprob >= tl.TopLogprobs[j-1].Logprob, "token %d: top_logprobs not in decreasing order", i)
			assert.Equal(t, top.Token, string(bytesOf(top.Bytes)), "top entry bytes %v; want the bytes of %q", top.Bytes, top.Token)
		}
		assert.False(t, mass > 1, "token %d: top probabilities sum to %v", i, mass)
	}
	assert.Equal(t, lc.Message.Content, joined, "logprob tokens join to %q; content %q", joined, lc.Message.Content)
	n := len(short.Choices[0].Logprobs.Content)
	assert.False(t, !strings.HasPrefix(lc.Message.Content, short.Choices[0].Message.Content) || (n < 5 && *short.Choices[0].FinishReason != "stop"), "5-token answer %q is not a prefix of the 12-token %q", short.Choices[0].Message.Content, lc.Message.Content)
	if assert.Equal(t, len(lc.Logprobs.Content), long.Usage.CompletionTokens, "usage %+v for %d tokens", *long.Usage, len(lc.Logprobs.Content)) {
		assert.NotEqual(t, 0, long.Usage.PromptTokens, "usage %+v for %d tokens", *long.Usage, len(lc.Logprobs.Content))
		assert.Equal(t, long.Usage.PromptTokens+long.Usage.CompletionTokens, long.Usage.TotalTokens, "usage %+v for %d tokens", *long.Usage, len(lc.Logprobs.Content))
	}
	// logprobs without top_logprobs: the content list with empty tops.
	var bare wire.ChatResponse
	postOK(t, up, "/chat/completions", `{"model":"quill-large","messages":[{"role":"user","content":"hi"}],"max_tokens":3,"logprobs":true}`, &bare)
	for _, tl := range bare.Choices[0].Logprobs.Content {
		assert.Len(t, tl.TopLogprobs, 0, "top_logprobs %v; want none", tl.TopLogprobs)
	}
}

func bytesOf(b []int) []byte {
	out := make([]byte, len(b))
	for i, v := range b {
		out[i] = byte(v)
	}
	return out
}

func TestChatStreamMatchesAnswer(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const base = `{"model":"quill-small","messages":[{"role":"user","content":"Count the hives."}],"temperature":0,"n":2,"max_tokens":6,"logprobs":true,"top_logprobs":2`
	var whole wire.ChatResponse
	postOK(t, up, "/chat/completions", base+`}`, &whole)
	_, body := post(t, up, "/chat/completions", base+`,"stream":true,"stream_options":{"include_usage":true}}`, nil)
	events := streamEvents(t, body)
	type acc struct {
		content string
		tokens  []wire.ChatTokenLogprob
		finish  string
		chunks  int
	}
	got := map[int]*acc{}
	var streamUsage *wire.Usage
	for i, data := range events {
		var c wire.ChatResponse
		require.NoError(t, json.Unmarshal(data, &c))
		assert.Equal(t, "chat.completion.chunk", c.Object, "object %q", c.Object)
		if c.Usage != nil {
			if assert.Equal(t, len(events)-1, i, "usage chunk at %d of %d with %d choices", i, len(events), len(c.Choices)) {
				assert.Len(t, c.Choices, 0, "usage chunk at %d of %d with %d choices", i, len(events), len(c.Choices))
			}
			streamUsage = c.Usage
			continue
		}
		ch := c.Choices[0]
		a := got[ch.Index]
		if a == nil {
			a = &acc{}
			got[ch.Index] = a
		}
		a.chunks++
		require.NotNil(t, ch.Delta, "chunk %s has no delta", data)
		assert.False(t, a.chunks == 1 && ch.Delta.Role != "assistant", "choice %d first delta role %q; want assistant", ch.Index, ch.Delta.Role)
		assert.False(t, a.chunks > 1 && ch.Delta.Role != "", "choice %d role repeated in chunk %d", ch.Index, a.chunks)
		if ch.Delta.Content != nil {
			a.content += *ch.Delta.Content
		}
		if ch.Logprobs != nil {
			a.tokens = append(a.tokens, ch.Logprobs.Content...)
		}
		if ch.FinishReason != nil {
			a.finish = *ch.FinishReason
		}
	}
	for _, w := range whole.Choices {
		a := got[w.Index]
		require.NotNil(t, a, "choice %d streamed %+v; answered %q (%s)", w.Index, a, w.Message.Content, *w.FinishReason)
		require.Equal(t, w.Message.Content, a.content, "choice %d streamed %+v; answered %q (%s)", w.Index, a, w.Message.Content, *w.FinishReason)
		require.Equal(t, *w.FinishReason, a.finish, "choice %d streamed %+v; answered %q (%s)", w.Index, a, w.Message.Content, *w.FinishReason)
		al, _ := json.Marshal(a.tokens)
		wl, _ := json.Marshal(w.Logprobs.Content)
		assert.Equal(t, string(wl), string(al), "choice %d streamed logprobs %s; answered %s", w.Index, al, wl)
	}
	if assert.NotNil(t, streamUsage, "stream usage %+v; want %+v", streamUsage, whole.Usage) {
		assert.True(t, *streamUsage == *whole.Usage, "stream usage %+v; want %+v", streamUsage, whole.Usage)
	}
}

func TestFaultStatus(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const body = `{"model":"quill-small","prompt":"hi","max_tokens":1}`
	up.FailNext(2, upstreamtest.Fault{Status: 429, RetryAfter: "3"})
	for i := range 2 {
		resp, b := post(t, up, "/completions", body, nil)
		var env errorEnvelope
		json.Unmarshal(b, &env)
		assert.Equal(t, 429, resp.StatusCode, "call %d: %d Retry-After %q body %s; want 429, 3, a rate_limit_error body", i, resp.StatusCode, resp.Header.Get("Retry-After"), b)
		assert.Equal(t, "3", resp.Header.Get("Retry-After"), "call %d: %d Retry-After %q body %s; want 429, 3, a rate_limit_error body", i, resp.StatusCode, resp.Header.Get("Retry-After"), b)
		if assert.NotNil(t, env.Error, "call %d: %d Retry-After %q body %s; want 429, 3, a rate_limit_error body", i, resp.StatusCode, resp.Header.Get("Retry-After"), b) {
			assert.Equal(t, "rate_limit_error", env.Error.Type, "call %d: %d Retry-After %q body %s; want 429, 3, a rate_limit_error body", i, resp.StatusCode, resp.Header.Get("Retry-After"), b)
		}
	}
	third, _ := post(t, up, "/completions", body, nil)
	assert.Equal(t, 200, third.StatusCode, "third call: want 200 once the two faults are used")
	assert.Equal(t, 3, up.Calls().Completions, "Calls %+v, Prompts %d; want 3 calls, 1 prompt", up.Calls(), up.Prompts())
	assert.Equal(t, 1, up.Prompts(), "Calls %+v, Prompts %d; want 3 calls, 1 prompt", up.Calls(), up.Prompts())

	up.FailNext(1, upstreamtest.Fault{Path: upstreamtest.PathChat, Status: 503, Body: "upstream busy"})
	completion, _ := post(t, up, "/completions", body, nil)
	assert.Equal(t, 200, completion.StatusCode, "completions call under a chat-only fault")
	resp, b := post(t, up, "/chat/completions", `{"model":"quill-small","messages":[{"role":"user","content":"hi"}]}`, nil)
	assert.Equal(t, 503, resp.StatusCode, "chat call: %d %q; want 503 with the given body", resp.StatusCode, b)
	assert.Equal(t, "upstream busy", string(b), "chat call: %d %q; want 503 with the given body", resp.StatusCode, b)

	up.FailNext(5, upstreamtest.Fault{Status: 500})
	up.ClearFaults()
	resp, _ = post(t, up, "/completions", body, nil)
	assert.Equal(t, 200, resp.StatusCode, "after ClearFaults: %d; want 200", resp.StatusCode)
}

func TestFaultRatio(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.FailRatio(0.5, upstreamtest.Fault{Status: 502})
	var got []int
	for range 6 {
		resp, _ := post(t, up, "/completions", `{"model":"quill-small","prompt":"hi","max_tokens":1}`, nil)
		got = append(got, resp.StatusCode)
	}
	want := []int{200, 502, 200, 502, 200, 502}
	assert.True(t, slices.Equal(got, want), "statuses %v; want %v", got, want)
	up.Reset()
	resp, _ := post(t, up, "/completions", `{"model":"quill-small","prompt":"hi","max_tokens":1}`, nil)
	assert.Equal(t, 200, resp.StatusCode, "after Reset: %d; want 200", resp.StatusCode)
}

// do sends a completions request under ctx and returns the response with
// its body read, or the error.
func do(ctx context.Context, up *upstreamtest.Server, body string) (*http.Response, []byte, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, up.URL()+"/completions", strings.NewReader(body))
	if err != nil {
		return nil, nil, err
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return nil, nil, err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return resp, b, err
}

func TestFaultHangAndDelay(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const body = `{"model":"quill-small","prompt":"hi","max_tokens":1}`
	for _, f := range []upstreamtest.Fault{{Hang: true}, {Delay: time.Hour}} {
		up.FailNext(1, f)
		ctx, cancel := context.WithTimeout(context.Background(), 50*time.Millisecond)
		_, _, err := do(ctx, up, body)
		cancel()
		assert.ErrorIs(t, err, context.DeadlineExceeded, "fault %+v: error %v; want the client's deadline", f, err)
	}
	up.FailNext(1, upstreamtest.Fault{Delay: time.Millisecond})
	resp, _, err := do(context.Background(), up, body)
	if assert.NoError(t, err, "short delay: %v; want a normal answer", err) {
		assert.Equal(t, 200, resp.StatusCode, "short delay: %v; want a normal answer", err)
	}
	got := up.Calls().Completions
	assert.Equal(t, 3, got, "Calls().Completions = %d; want 3", got)
}

func TestFaultHangReleasedByClose(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	up.FailNext(1, upstreamtest.Fault{Hang: true})
	up.Block() // to know when the call has arrived
	errc := make(chan error, 1)
	go func() {
		_, _, err := do(context.Background(), up, `{"model":"quill-small","prompt":"hi"}`)
		errc <- err
	}()
	require.NoError(t, up.AwaitHeld(context.Background(), 1))
	up.Release() // now it hangs in the fault
	up.Close()   // must not wait for the hanging call forever
	<-errc
}

func TestFaultReset(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.FailNext(1, upstreamtest.Fault{Reset: true})
	_, _, err := do(context.Background(), up, `{"model":"quill-small","prompt":"hi"}`)
	assert.Error(t, err, "reset connection: no error; want the client to see the connection drop")
	resp, _, err := do(context.Background(), up, `{"model":"quill-small","prompt":"hi"}`)
	if assert.NoError(t, err, "next call: %v; want a normal answer", err) {
		assert.Equal(t, 200, resp.StatusCode, "next call: %v; want a normal answer", err)
	}
}

func TestFaultCut(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.FailNext(1, upstreamtest.Fault{Cut: 20})
	_, cut, cutErr := do(context.Background(), up, `{"model":"quill-small","prompt":"hi"}`)
	assert.ErrorIs(t, cutErr, io.ErrUnexpectedEOF, "cut JSON answer")
	assert.Len(t, cut, 20, "cut JSON answer: %d bytes, want 20", len(cut))
	up.FailNext(1, upstreamtest.Fault{Cut: 3})
	req, _ := http.NewRequest(http.MethodPost, up.URL()+"/completions", strings.NewReader(`{"model":"quill-small","prompt":"hi","stream":true,"max_tokens":10}`))
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	r := sse.NewReader(resp.Body)
	n := 0
	for {
		ev, err := r.Next()
		if err != nil {
			assert.ErrorIs(t, err, io.ErrUnexpectedEOF, "cut stream ended with %v; want an unexpected EOF", err)
			break
		}
		require.False(t, ev.IsDone(), "cut stream sent [DONE]")
		n++
	}
	assert.Equal(t, 3, n, "cut stream gave %d events; want 3", n)
}

func TestBlockRelease(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.Block()
	const callers = 8
	results := make(chan int, callers)
	var wg sync.WaitGroup
	for range callers {
		wg.Go(func() {
			resp, _, err := do(context.Background(), up, `{"model":"quill-small","prompt":"hi","max_tokens":2}`)
			if !assert.NoError(t, err) {
				results <- 0
				return
			}
			results <- resp.StatusCode
		})
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, callers))
	got := up.Held()
	assert.Equal(t, callers, got, "Held() = %d; want %d", got, callers)
	got = up.Calls().Completions
	assert.Equal(t, callers, got, "held calls counted %d; want %d (counted on arrival)", got, callers)
	select {
	case s := <-results:
		require.Failf(t, "a held call answered before Release", "status %d", s)
	default:
	}
	assert.Equal(t, 0, up.Prompts(), "Prompts() = %d while held; want 0", up.Prompts())
	up.Release()
	wg.Wait()
	close(results)
	for s := range results {
		assert.Equal(t, 200, s, "released call: status %d", s)
	}
	assert.Equal(t, 0, up.Held(), "after Release: Held %d, Prompts %d; want 0, %d", up.Held(), up.Prompts(), callers)
	assert.Equal(t, callers, up.Prompts(), "after Release: Held %d, Prompts %d; want 0, %d", up.Held(), up.Prompts(), callers)
	// Not blocked any more.
	resp, _, err := do(context.Background(), up, `{"model":"quill-small","prompt":"hi"}`)
	if assert.NoError(t, err, "call after Release: %v", err) {
		assert.Equal(t, 200, resp.StatusCode, "call after Release: %v", err)
	}
}

func TestHeldCallGivesUp(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.Block()
	defer up.Release()
	ctx, cancel := context.WithCancel(context.Background())
	errc := make(chan error, 1)
	go func() {
		_, _, err := do(ctx, up, `{"model":"quill-small","prompt":"hi"}`)
		errc <- err
	}()
	require.NoError(t, up.AwaitHeld(context.Background(), 1))
	cancel()
	err := <-errc
	assert.ErrorIs(t, err, context.Canceled, "error %v; want context.Canceled", err)
	// The server notices the client leaving and stops holding the call.
	waitCtx, stop := context.WithTimeout(context.Background(), 10*time.Second)
	defer stop()
	require.NoError(t, up.AwaitHeld(waitCtx, 0), "held call not released after the client left")
	short, stop2 := context.WithCancel(context.Background())
	stop2()
	err = up.AwaitHeld(short, 1)
	assert.ErrorIs(t, err, context.Canceled, "AwaitHeld with a done context: %v; want context.Canceled", err)
}

// TestTopLogprobsOrder checks that each top_logprobs object lists its
// entries most likely first, as the real API does, by reading the raw
// JSON in order.
func TestTopLogprobsOrder(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	_, body := post(t, up, "/completions", `{"model":"quill-small","prompt":"The warden counts crates","max_tokens":6,"temperature":0,"logprobs":8}`, nil)
	var raw struct {
		Choices []struct {
			Logprobs struct {
				TopLogprobs []json.RawMessage `json:"top_logprobs"`
			} `json:"logprobs"`
		} `json:"choices"`
	}
	require.NoError(t, json.Unmarshal(body, &raw))
	tops := raw.Choices[0].Logprobs.TopLogprobs
	require.NotEqual(t, 0, len(tops), "no top_logprobs in %s", body)
	for i, obj := range tops {
		dec := json.NewDecoder(strings.NewReader(string(obj)))
		dec.Token() // {
		prev, n := 0.0, 0
		for dec.More() {
			dec.Token() // key
			var v float64
			require.NoError(t, dec.Decode(&v))
			assert.False(t, n > 0 && v >= prev, "position %d: entry %d (%v) not below the one before (%v) in %s", i, n, v, prev, obj)
			prev = v
			n++
		}
		assert.Equal(t, 8, n, "position %d: %d entries; want 8", i, n)
	}
}

func TestMaxConcurrentCountsCallsServedAtOnce(t *testing.T) {
	s := upstreamtest.New(upstreamtest.Options{})
	defer s.Close()
	s.Block()
	const n = 5
	var wg sync.WaitGroup
	for range n {
		wg.Go(func() {
			resp, err := http.Post(s.URL()+"/completions", "application/json", strings.NewReader(`{"model":"quill-small","prompt":"a","temperature":0}`))
			if err == nil {
				resp.Body.Close()
			}
		})
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	require.NoError(t, s.AwaitHeld(ctx, n))
	s.Release()
	wg.Wait()
	got := s.MaxConcurrent()
	assert.Equal(t, n, got, "MaxConcurrent = %d, want %d", got, n)
	s.Reset()
	got = s.MaxConcurrent()
	assert.Equal(t, 0, got, "after Reset: MaxConcurrent = %d, want 0", got)
}

func TestFaultEchoAuth(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	const (
		auth = "Bearer echo-me-key-123"
		body = `{"model":"quill-small","prompt":"hi","max_tokens":1}`
	)
	hdr := http.Header{"Authorization": {auth}}
	tests := []struct {
		name  string
		fault upstreamtest.Fault
		want  []string // in the body
	}{
		{"error body", upstreamtest.Fault{Status: 401, EchoAuth: true}, []string{
			auth,
			base64.StdEncoding.EncodeToString([]byte(auth)),
			base64.URLEncoding.EncodeToString([]byte(auth)),
			base64.StdEncoding.EncodeToString([]byte("apikey:echo-me-key-123")),
		}},
		{"given body", upstreamtest.Fault{Status: 200, EchoAuth: true, Body: `{"seen":"` + upstreamtest.AuthPlaceholder + `"}`}, []string{`{"seen":"` + auth + `"}`}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			up.FailNext(1, tt.fault)
			resp, b := post(t, up, "/completions", body, hdr)
			assert.Equal(t, tt.fault.Status, resp.StatusCode)
			assert.Equal(t, auth, resp.Header.Get(upstreamtest.HeaderReceivedAuth))
			for _, w := range tt.want {
				assert.Contains(t, string(b), w)
			}
		})
	}
}
