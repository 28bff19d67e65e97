package localmodel

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"math"
	"mime"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"

	openai "github.com/sashabaranov/go-openai"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/wire"
)

func TestArrayPromptsAndN(t *testing.T) {
	m := loadModel(t)
	srv, _ := testServer(t, m, HandlerOptions{})
	prompts := []string{"Lily saw", "Tim had a big"}
	r := complete(t, srv, map[string]any{"prompt": prompts, "n": 2, "temperature": 0, "max_tokens": 6})
	require.Len(t, r.Choices, 4, "got %d choices, want 4", len(r.Choices))
	wantPrompt := 0
	for pi, p := range prompts {
		// Greedy output is the same whatever batch it ran in.
		single := complete(t, srv, map[string]any{"prompt": p, "temperature": 0, "max_tokens": 6})
		for j := 0; j < 2; j++ {
			c := r.Choices[pi*2+j]
			assert.False(t, c.Index != pi*2+j || c.Text != single.Choices[0].Text, "choice %d: index %d text %q; want index %d text %q", pi*2+j, c.Index, c.Text, pi*2+j, single.Choices[0].Text)
		}
		wantPrompt += 1 + len(m.tok.Encode(p))
	}
	assert.Equal(t, wantPrompt, r.Usage.PromptTokens, "usage %+v; want prompt %d, completion 24", *r.Usage, wantPrompt)
	assert.Equal(t, 24, r.Usage.CompletionTokens, "usage %+v; want prompt %d, completion 24", *r.Usage, wantPrompt)
	assert.Equal(t, wantPrompt+24, r.Usage.TotalTokens, "usage %+v; want prompt %d, completion 24", *r.Usage, wantPrompt)
	assert.Equal(t, "text_completion", r.Object, "envelope: %+v", r)
	assert.Equal(t, DefaultName, r.Model, "envelope: %+v", r)
	assert.True(t, strings.HasPrefix(r.ID, "cmpl-"), "envelope: %+v", r)
}

func TestTokenPrompt(t *testing.T) {
	m := loadModel(t)
	srv, _ := testServer(t, m, HandlerOptions{})
	text := complete(t, srv, map[string]any{"prompt": "Once upon", "temperature": 0, "max_tokens": 4})
	ids := complete(t, srv, map[string]any{"prompt": m.tok.Encode("Once upon"), "temperature": 0, "max_tokens": 4})
	nested := complete(t, srv, map[string]any{"prompt": [][]int{m.tok.Encode("Once upon")}, "temperature": 0, "max_tokens": 4})
	assert.False(t, ids.Choices[0].Text != text.Choices[0].Text || nested.Choices[0].Text != text.Choices[0].Text, "token prompt gave %q / %q, text prompt %q", ids.Choices[0].Text, nested.Choices[0].Text, text.Choices[0].Text)
}

// TestEchoLogprobs: echo puts the prompt first with its token logprobs (the
// first null); each equals the log-softmax of Forward's logits.
func TestEchoLogprobs(t *testing.T) {
	m := loadModel(t)
	srv, _ := testServer(t, m, HandlerOptions{})
	prompt := "Once upon a time"
	r := complete(t, srv, map[string]any{"prompt": prompt, "echo": true, "logprobs": 2, "max_tokens": 3, "temperature": 0})
	c := r.Choices[0]
	require.True(t, strings.HasPrefix(c.Text, prompt), "text %q does not start with the prompt", c.Text)
	require.Greater(t, len(c.Text), len(prompt), "text %q does not start with the prompt", c.Text)
	ptoks := m.tok.Encode(prompt)
	lp := c.Logprobs
	require.Len(t, lp.Tokens, len(ptoks)+3, "got %d tokens, want %d", len(lp.Tokens), len(ptoks)+3)
	assert.Nil(t, lp.TokenLogprobs[0], "first prompt token: logprob, want null")
	assert.Nil(t, lp.TopLogprobs[0], "first prompt token: top_logprobs, want null")
	assert.Equal(t, 0, lp.TextOffset[0], "first prompt token: offset")
	out, err := m.Forward(context.Background(), append([]int{1}, ptoks...))
	require.NoError(t, err)
	for i := 1; i < len(ptoks); i++ {
		row := out.Logits.Row(i) // position i predicts prompt token i (BOS is position 0)
		want := float64(row[ptoks[i]]) - logSumExp(row)
		got := *lp.TokenLogprobs[i]
		assert.False(t, math.Abs(got-want) > 1e-9, "prompt token %d: logprob %v, want %v", i, got, want)
		assert.Equal(t, 2, lp.TopLogprobs[i].Len(), "prompt token %d: %d alternatives, want 2", i, lp.TopLogprobs[i].Len())
	}
	for i := range lp.Tokens {
		tok, off := lp.Tokens[i], lp.TextOffset[i]
		if i == 0 {
			tok = strings.TrimPrefix(tok, " ")
		}
		assert.True(t, strings.HasPrefix(c.Text[off:], tok), "token %d %q not at offset %d of %q", i, tok, off, c.Text)
	}
	// max_tokens 0 with echo scores the prompt without generating.
	r = complete(t, srv, map[string]any{"prompt": prompt, "echo": true, "logprobs": 0, "max_tokens": 0})
	c = r.Choices[0]
	assert.Equal(t, prompt, c.Text, "scoring: text %q, %d tokens, usage %+v", c.Text, len(c.Logprobs.Tokens), *r.Usage)
	if assert.Len(t, c.Logprobs.Tokens, len(ptoks), "scoring: text %q, %d tokens, usage %+v", c.Text, len(c.Logprobs.Tokens), *r.Usage) {
		assert.Equal(t, 0, r.Usage.CompletionTokens, "scoring: text %q, %d tokens, usage %+v", c.Text, len(c.Logprobs.Tokens), *r.Usage)
		assert.Equal(t, "length", *c.FinishReason, "scoring: text %q, %d tokens, usage %+v", c.Text, len(c.Logprobs.Tokens), *r.Usage)
	}
}

func TestStop(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	body := map[string]any{"prompt": "", "temperature": 0, "max_tokens": 40, "stop": []string{"girl", "zebra"}, "logprobs": 0}
	r := complete(t, srv, body)
	c := r.Choices[0]
	want := "Once upon a time, there was a little "
	assert.False(t, c.Text != want || *c.FinishReason != "stop", "got %q (%s), want %q (stop)", c.Text, *c.FinishReason, want)
	// Logprobs cover the tokens whose text starts before the cut (the
	// last one, " g", straddles it).
	lp := c.Logprobs
	joined := strings.TrimPrefix(strings.Join(lp.Tokens, ""), " ")
	assert.True(t, strings.HasPrefix(joined, c.Text), "tokens %q do not start with the text %q", joined, c.Text)
	assert.Less(t, lp.TextOffset[len(lp.TextOffset)-1], len(c.Text), "offsets %v do not end at the cut of %q", lp.TextOffset, c.Text)
	body["stream"] = true
	events, _ := stream(t, srv.URL+"/v1/completions", body)
	got := joinCompletionStream(t, events)
	assert.Equal(t, c.Text, got, "stream text %q, want %q", got, c.Text)
}

func joinCompletionStream(tb testing.TB, events []string) string {
	tb.Helper()
	require.NotEqual(tb, 0, len(events), "stream does not end with [DONE]: %q", events)
	require.Equal(tb, "[DONE]", events[len(events)-1], "stream does not end with [DONE]: %q", events)
	var b strings.Builder
	for _, e := range events[:len(events)-1] {
		var c wire.CompletionResponse
		require.NoError(tb, json.Unmarshal([]byte(e), &c), "event %q", e)
		for _, ch := range c.Choices {
			b.WriteString(ch.Text)
		}
	}
	return b.String()
}

func TestSeededSampling(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	texts := func(seed int, topP float64) []string {
		r := complete(t, srv, map[string]any{"prompt": "Tim", "temperature": 1, "top_p": topP, "seed": seed, "n": 3, "max_tokens": 20})
		var out []string
		for _, c := range r.Choices {
			out = append(out, c.Text)
		}
		return out
	}
	a, b, other := texts(42, 1), texts(42, 1), texts(43, 1)
	assert.Equal(t, strings.Join(b, "|"), strings.Join(a, "|"), "same seed gave %q and %q", a, b)
	assert.False(t, strings.Join(a, "|") == strings.Join(other, "|") || a[0] == a[1], "seeds 42 and 43 (or two choices) gave the same samples: %q %q", a, other)
	// A nucleus this small holds only the top token: sampling is greedy.
	greedy := complete(t, srv, map[string]any{"prompt": "Tim", "temperature": 0, "max_tokens": 20}).Choices[0].Text
	for _, s := range texts(7, 1e-9) {
		assert.Equal(t, greedy, s, "top_p 1e-9 gave %q, want greedy %q", s, greedy)
	}
}

func TestStreamMatchesNonStream(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	body := map[string]any{"prompt": []string{"A little dog", "The sun"}, "n": 2, "temperature": 0, "max_tokens": 12, "logprobs": 1, "echo": true}
	plain := complete(t, srv, body)
	body["stream"] = true
	body["stream_options"] = map[string]any{"include_usage": true}
	events, hdr := stream(t, srv.URL+"/v1/completions", body)
	mt, _, err := mime.ParseMediaType(hdr.Get("Content-Type"))
	require.NoError(t, err)
	assert.Equal(t, "text/event-stream", mt)
	require.NotEmpty(t, events)
	assert.Equal(t, "[DONE]", events[len(events)-1], "the last event")
	texts := map[int]string{}
	toks := map[int][]string{}
	finish := map[int]string{}
	var u *wire.Usage
	for _, e := range events[:len(events)-1] {
		var c wire.CompletionResponse
		require.NoError(t, json.Unmarshal([]byte(e), &c))
		if c.Usage != nil {
			assert.Empty(t, c.Choices, "the usage chunk's choices")
			u = c.Usage
		}
		for _, ch := range c.Choices {
			texts[ch.Index] += ch.Text
			toks[ch.Index] = append(toks[ch.Index], ch.Logprobs.Tokens...)
			if ch.FinishReason != nil {
				finish[ch.Index] = *ch.FinishReason
			}
		}
	}
	for _, c := range plain.Choices {
		assert.Equal(t, c.Text, texts[c.Index], "choice %d text", c.Index)
		assert.Equal(t, c.Logprobs.Tokens, toks[c.Index], "choice %d tokens", c.Index)
		assert.Equal(t, *c.FinishReason, finish[c.Index], "choice %d finish_reason", c.Index)
	}
	require.NotNil(t, u, "a usage chunk")
	assert.Equal(t, *plain.Usage, *u, "stream usage")
}

func TestChat(t *testing.T) {
	m := loadModel(t)
	srv, _ := testServer(t, m, HandlerOptions{Name: "tiny"})
	body := map[string]any{
		"messages":    []map[string]any{{"role": "system", "content": "Tell short stories."}, {"role": "user", "content": []map[string]string{{"type": "text", "text": "A story about a cat"}}}},
		"temperature": 0, "max_tokens": 8, "logprobs": true, "top_logprobs": 3,
	}
	status, out, _ := post(t, srv.URL+"/v1/chat/completions", body)
	require.Equal(t, http.StatusOK, status, "%s", out)
	var r wire.ChatResponse
	require.NoError(t, json.Unmarshal(out, &r))
	require.Len(t, r.Choices, 1)
	c := r.Choices[0]
	require.NotNil(t, c.Message)
	assert.Equal(t, "chat.completion", r.Object)
	assert.Equal(t, "tiny", r.Model)
	assert.Equal(t, "assistant", c.Message.Role)
	assert.Equal(t, "length", *c.FinishReason)
	prompt := "System: Tell short stories.\nUser: A story about a cat\nAssistant:"
	require.NotNil(t, r.Usage)
	assert.Equal(t, 1+len(m.tok.Encode(prompt)), r.Usage.PromptTokens, "prompt tokens: template + BOS")
	assert.Equal(t, 8, r.Usage.CompletionTokens)
	var joined []byte
	for i, e := range c.Logprobs.Content {
		for _, b := range e.Bytes {
			joined = append(joined, byte(b))
		}
		if assert.Len(t, e.TopLogprobs, 3, "token %d %q", i, e.Token) {
			assert.Equal(t, e.Token, e.TopLogprobs[0].Token, "token %d: the greedy token first", i)
			assert.Equal(t, e.Logprob, e.TopLogprobs[0].Logprob, "token %d", i)
		}
	}
	assert.Equal(t, c.Message.Content, strings.TrimPrefix(string(joined), " "), "logprob bytes")
	body["stream"] = true
	events, _ := stream(t, srv.URL+"/v1/chat/completions", body)
	var content strings.Builder
	var role string
	for _, e := range events[:len(events)-1] {
		var ch wire.ChatResponse
		require.NoError(t, json.Unmarshal([]byte(e), &ch))
		assert.Equal(t, "chat.completion.chunk", ch.Object)
		for _, x := range ch.Choices {
			if x.Delta.Role != "" {
				role = x.Delta.Role
			}
			if x.Delta.Content != nil {
				content.WriteString(*x.Delta.Content)
			}
		}
	}
	assert.Equal(t, "assistant", role, "streamed role")
	assert.Equal(t, c.Message.Content, content.String(), "streamed content")
}

func TestBadRequests(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{MaxBodyBytes: 1 << 10})
	long := strings.Repeat("a ", 3000)
	tests := []struct {
		name, path, body string
		status           int
	}{
		{"invalid json", "/v1/completions", `{"prompt":`, 400},
		{"prompt wrong type", "/v1/completions", `{"prompt": 5}`, 400},
		{"prompt empty array", "/v1/completions", `{"prompt": []}`, 400},
		{"max_tokens wrong type", "/v1/completions", `{"prompt": "a", "max_tokens": "x"}`, 400},
		{"negative max_tokens", "/v1/completions", `{"prompt": "a", "max_tokens": -1}`, 400},
		{"logprobs beyond vocab", "/v1/completions", `{"prompt": "a", "logprobs": 513}`, 400},
		{"temperature too high", "/v1/completions", `{"prompt": "a", "temperature": 3}`, 400},
		{"top_p zero", "/v1/completions", `{"prompt": "a", "top_p": 0}`, 400},
		{"n zero", "/v1/completions", `{"prompt": "a", "n": 0}`, 400},
		{"stop wrong type", "/v1/completions", `{"prompt": "a", "stop": 3}`, 400},
		{"token out of range", "/v1/completions", `{"prompt": [1, 999]}`, 400},
		{"body too large", "/v1/completions", `{"prompt": "` + long + `"}`, 413},
		{"no messages", "/v1/chat/completions", `{"messages": []}`, 400},
		{"bad role", "/v1/chat/completions", `{"messages": [{"role": "robot", "content": "x"}]}`, 400},
		{"image part", "/v1/chat/completions", `{"messages": [{"role": "user", "content": [{"type": "image_url"}]}]}`, 400},
		{"top_logprobs without logprobs", "/v1/chat/completions", `{"messages": [{"role": "user", "content": "x"}], "top_logprobs": 2}`, 400},
		{"top_logprobs beyond vocab", "/v1/chat/completions", `{"messages": [{"role": "user", "content": "x"}], "logprobs": true, "top_logprobs": 600}`, 400},
		{"unknown path", "/v1/embeddings", `{}`, 404},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			status, out, hdr := post(t, srv.URL+tc.path, tc.body)
			require.Equal(t, tc.status, status, "%s", out)
			checkErrorBody(t, out, hdr)
		})
	}
	resp, err := http.Get(srv.URL + "/v1/completions")
	require.NoError(t, err)
	b, err := io.ReadAll(resp.Body)
	resp.Body.Close()
	require.NoError(t, err)
	assert.Equal(t, http.StatusMethodNotAllowed, resp.StatusCode, "GET completions")
	assert.Equal(t, "POST", resp.Header.Get("Allow"), "GET completions")
	checkErrorBody(t, b, resp.Header)
}

func TestContextTooLong(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	ids := make([]int, 2048) // with BOS: one more than the context
	for i := range ids {
		ids[i] = 300
	}
	status, out, hdr := post(t, srv.URL+"/v1/completions", map[string]any{"prompt": ids})
	assert.Equal(t, 400, status, "status %d body %s", status, out)
	assert.Contains(t, string(out), "context_length_exceeded", "status %d body %s", status, out)
	checkErrorBody(t, out, hdr)
}

func checkErrorBody(tb testing.TB, out []byte, hdr http.Header) {
	tb.Helper()
	var e wire.ErrorBody
	if assert.NoError(tb, json.Unmarshal(out, &e), "error body %s", out) {
		assert.NotEmpty(tb, e.Error.Message, "error body %s: message", out)
		assert.NotEmpty(tb, e.Error.Type, "error body %s: type", out)
		assert.NotEmpty(tb, e.Error.Code, "error body %s: code", out)
	}
	assert.Equal(tb, "application/json", hdr.Get("Content-Type"))
}

func TestUnknownFieldsAndModels(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{Name: "story-box"})
	r := complete(t, srv, `{"prompt": "a", "max_tokens": 1, "frobnicate": {"x": [1, 2]}, "user": "u1"}`)
	if assert.Len(t, r.Choices, 1, "got %+v", r) {
		assert.Equal(t, "story-box", r.Model, "got %+v", r)
	}
	resp, err := http.Get(srv.URL + "/v1/models")
	require.NoError(t, err)
	defer resp.Body.Close()
	var l wire.ModelList
	err = json.NewDecoder(resp.Body).Decode(&l)
	if assert.NoError(t, err, "models: %+v %v", l, err) {
		if assert.Len(t, l.Data, 1, "models: %+v %v", l, err) {
			assert.Equal(t, "story-box", l.Data[0].ID, "models: %+v %v", l, err)
			assert.Equal(t, "list", l.Object, "models: %+v %v", l, err)
		}
	}
}

// cancelWriter is a ResponseWriter that cancels the request on its first
// write, like a client that disconnects after one event.
type cancelWriter struct {
	header http.Header
	cancel context.CancelFunc
	buf    bytes.Buffer
	writes int
}

func (w *cancelWriter) Header() http.Header { return w.header }
func (w *cancelWriter) WriteHeader(int)     {}
func (w *cancelWriter) Write(b []byte) (int, error) {
	w.writes++
	w.cancel()
	return w.buf.Write(b)
}

func TestCancellationStopsGeneration(t *testing.T) {
	m := loadModel(t)
	h := NewHandler(m, HandlerOptions{})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	body := `{"prompt": "", "max_tokens": 2000, "stream": true, "temperature": 0}`
	req := httptest.NewRequestWithContext(ctx, http.MethodPost, "/v1/completions", strings.NewReader(body))
	w := &cancelWriter{header: http.Header{}, cancel: cancel}
	h.ServeHTTP(w, req)
	// Generation checks the context before every token, so after the
	// first event at most one more token's event (and an error) follow.
	assert.LessOrEqual(t, w.writes, 3, "%d events written after cancellation, want at most 3", w.writes)
}

// blockingWriter blocks its first Write until release is closed.
type blockingWriter struct {
	header  http.Header
	entered chan struct{}
	release chan struct{}
	once    sync.Once
	buf     bytes.Buffer
}

func (w *blockingWriter) Header() http.Header { return w.header }
func (w *blockingWriter) WriteHeader(int)     {}
func (w *blockingWriter) Write(b []byte) (int, error) {
	w.once.Do(func() { close(w.entered); <-w.release })
	return w.buf.Write(b)
}

// TestWorkerPoolBound: with one worker, a second request waits while the
// first holds the slot, and runs once it is freed.
func TestWorkerPoolBound(t *testing.T) {
	m := loadModel(t)
	hh := NewHandler(m, HandlerOptions{Workers: 1})
	h := hh.(*handler)
	waiting := make(chan struct{})
	h.waitHook = func() { close(waiting) }
	a := &blockingWriter{header: http.Header{}, entered: make(chan struct{}), release: make(chan struct{})}
	doneA := make(chan struct{})
	go func() {
		defer close(doneA)
		req := httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(`{"prompt": "a", "max_tokens": 3, "stream": true}`))
		h.ServeHTTP(a, req)
	}()
	<-a.entered // A holds the only slot, blocked writing
	recB := httptest.NewRecorder()
	doneB := make(chan struct{})
	go func() {
		defer close(doneB)
		req := httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(`{"prompt": "b", "max_tokens": 3}`))
		h.ServeHTTP(recB, req)
	}()
	<-waiting // B found no free worker
	close(a.release)
	<-doneA
	<-doneB
	assert.Equal(t, http.StatusOK, recB.Code, "B status %d, peak active %d; want 200, 1", recB.Code, h.maxActive.Load())
	assert.Equal(t, int64(1), h.maxActive.Load(), "B status %d, peak active %d; want 200, 1", recB.Code, h.maxActive.Load())
	assert.True(t, strings.HasSuffix(a.buf.String(), "data: [DONE]\n\n"), "A's stream did not finish: %q", a.buf.String())
	// A waiting request whose context ends gives up.
	h.waitHook = nil
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	h.slots <- struct{}{} // occupy the slot
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequestWithContext(ctx, http.MethodPost, "/v1/completions", strings.NewReader(`{"prompt": "c"}`)))
	<-h.slots
	assert.Equal(t, http.StatusServiceUnavailable, rec.Code, "cancelled while waiting: status %d, want 503", rec.Code)
}

// TestConcurrentGreedy: concurrent identical greedy requests (sharing the
// prefix cache) all get the same text.
func TestConcurrentGreedy(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{Workers: 3})
	body := map[string]any{"prompt": "The little bird", "temperature": 0, "max_tokens": 10}
	want := complete(t, srv, body).Choices[0].Text
	reqBody, err := json.Marshal(body)
	require.NoError(t, err)
	var wg sync.WaitGroup
	got := make([]string, 8)
	for i := range got {
		wg.Add(1)
		go func() { // off the test's goroutine: assert, never require
			defer wg.Done()
			resp, err := http.Post(srv.URL+"/v1/completions", "application/json", bytes.NewReader(reqBody))
			if !assert.NoError(t, err) {
				return
			}
			defer resp.Body.Close()
			var r wire.CompletionResponse
			if assert.Equal(t, http.StatusOK, resp.StatusCode) && assert.NoError(t, json.NewDecoder(resp.Body).Decode(&r)) &&
				assert.NotEmpty(t, r.Choices) {
				got[i] = r.Choices[0].Text
			}
		}()
	}
	wg.Wait()
	for i, g := range got {
		assert.Equal(t, want, g, "request %d: %q, want %q", i, g, want)
	}
}

// TestOpenAIClient drives the server with a real client library of the
// wire format.
func TestOpenAIClient(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	cfg := openai.DefaultConfig("unused")
	cfg.BaseURL = srv.URL + "/v1"
	client := openai.NewClientWithConfig(cfg)
	ctx := context.Background()
	seed := 3
	cr, err := client.CreateCompletion(ctx, openai.CompletionRequest{Model: DefaultName, Prompt: []string{"Lily", "Tim"}, MaxTokens: 5, Seed: &seed, LogProbs: 2})
	require.NoError(t, err)
	if assert.Len(t, cr.Choices, 2, "completion: %+v", cr) {
		if assert.Len(t, cr.Choices[1].LogProbs.Tokens, 5, "completion: %+v", cr) {
			assert.Equal(t, 10, cr.Usage.CompletionTokens, "completion: %+v", cr)
		}
	}
	st, err := client.CreateChatCompletionStream(ctx, openai.ChatCompletionRequest{
		//lint:ignore SA1019 max_tokens is the field of the wire format stint serves; the SDK sends it through MaxTokens
		Model: DefaultName, MaxTokens: 6, Seed: &seed,
		Messages:      []openai.ChatCompletionMessage{{Role: openai.ChatMessageRoleUser, Content: "Hello"}},
		StreamOptions: &openai.StreamOptions{IncludeUsage: true},
	})
	require.NoError(t, err)
	defer st.Close()
	var text string
	var u *openai.Usage
	for {
		resp, err := st.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err)
		for _, c := range resp.Choices {
			text += c.Delta.Content
		}
		if resp.Usage != nil {
			u = resp.Usage
		}
	}
	assert.NotEqual(t, "", text, "chat stream: text %q usage %+v", text, u)
	if assert.NotNil(t, u, "chat stream: text %q usage %+v", text, u) {
		assert.Equal(t, 6, u.CompletionTokens, "chat stream: text %q usage %+v", text, u)
	}
}

// TestHealthzLikeTheProxy: stint local answers GET /healthz as the proxy
// does (200, "ok\n", plain text), so the same probes check both.
func TestHealthzLikeTheProxy(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	resp, err := http.Get(srv.URL + "/healthz")
	require.NoError(t, err)
	b, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	assert.Equal(t, http.StatusOK, resp.StatusCode, "GET /healthz: %d %q %q, want 200 \"ok\\n\" text/plain", resp.StatusCode, b, resp.Header.Get("Content-Type"))
	assert.Equal(t, "ok\n", string(b), "GET /healthz: %d %q %q, want 200 \"ok\\n\" text/plain", resp.StatusCode, b, resp.Header.Get("Content-Type"))
	assert.Equal(t, "text/plain; charset=utf-8", resp.Header.Get("Content-Type"), "GET /healthz: %d %q %q, want 200 \"ok\\n\" text/plain", resp.StatusCode, b, resp.Header.Get("Content-Type"))
	resp, err = http.Post(srv.URL+"/healthz", "text/plain", nil)
	require.NoError(t, err)
	b, _ = io.ReadAll(resp.Body)
	resp.Body.Close()
	assert.Equal(t, http.StatusMethodNotAllowed, resp.StatusCode, "POST /healthz: %d Allow %q", resp.StatusCode, resp.Header.Get("Allow"))
	assert.Equal(t, "GET, HEAD", resp.Header.Get("Allow"), "POST /healthz: %d Allow %q", resp.StatusCode, resp.Header.Get("Allow"))
	checkErrorBody(t, b, resp.Header)
}

// TestTopLogprobsMostLikelyFirst checks each top_logprobs object lists its
// entries most likely first, as the wire format does (and the proxy's
// shaping of smaller answers relies on), with the greedy token first.
func TestTopLogprobsMostLikelyFirst(t *testing.T) {
	srv, _ := testServer(t, loadModel(t), HandlerOptions{})
	r := complete(t, srv, map[string]any{"prompt": "Once upon a time", "temperature": 0, "max_tokens": 5, "logprobs": 6})
	require.Len(t, r.Choices, 1)
	lp := r.Choices[0].Logprobs
	require.NotNil(t, lp)
	require.Len(t, lp.TopLogprobs, 5)
	for i, top := range lp.TopLogprobs {
		require.Equal(t, 6, top.Len(), "token %d", i)
		assert.Equal(t, lp.Tokens[i], top.Tokens[0], "token %d: the greedy token first", i)
		for j := 1; j < top.Len(); j++ {
			assert.GreaterOrEqual(t, top.Logprobs[j-1], top.Logprobs[j], "token %d: entries %d and %d out of order in %v", i, j-1, j, top.Tokens)
		}
	}
}
