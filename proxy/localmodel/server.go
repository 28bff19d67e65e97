package localmodel

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"runtime"
	"strings"
	"sync/atomic"
	"time"

	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/wire"
)

// HandlerOptions configures NewHandler. The zero value of every field
// selects its default.
type HandlerOptions struct {
	// Name is the model id reported in responses and by GET /v1/models;
	// "" means "stories260K". Requests may name any model: the field is
	// not checked.
	Name string
	// Workers bounds how many requests compute at once; others wait for a
	// slot (honouring their context). 0 means runtime.GOMAXPROCS(0).
	Workers int
	// PrefixCacheTokens bounds the positions kept by the prefix cache; 0
	// means 65536, -1 turns the cache off.
	PrefixCacheTokens int
	// MaxBodyBytes bounds a request body (413 beyond it); 0 means 4 MiB.
	MaxBodyBytes int64
	// Now returns the time for "created"; nil means time.Now.
	Now func() time.Time
}

// DefaultName is the model id reported when HandlerOptions.Name is empty.
const DefaultName = "stories260K"

// defaultCompletionTokens is max_tokens for completions when absent (the
// wire format's customary default).
const defaultCompletionTokens = 16

// maxChoices bounds prompts × n in one request.
const maxChoices = 128

// handler serves the completions wire format for one model.
type handler struct {
	m       *Model
	eng     *engine
	name    string
	maxBody int64
	now     func() time.Time
	slots   chan struct{}

	// waitHook, when set (tests only), runs when a request finds every
	// worker busy and starts to wait.
	waitHook func()
	// active counts requests holding a worker slot; maxActive is its peak.
	active, maxActive atomic.Int64
}

// NewHandler returns an http.Handler that serves m on the completions wire
// format. It routes these exact paths itself:
//
//   - POST /v1/completions: prompt as a string, array of strings, array of
//     token ids or array of token-id arrays; max_tokens (default 16; 0 with
//     echo scores a prompt), temperature (default 1; 0 is greedy), top_p,
//     seed, stop (string or array), n, logprobs (0 … vocabulary size), echo
//     (prompt text first, with prompt-token logprobs, the first null),
//     stream and stream_options.include_usage.
//   - POST /v1/chat/completions: messages rendered with the chat template
//     below; max_tokens or max_completion_tokens (default: the rest of the
//     context), temperature, top_p, seed, stop, n, logprobs, top_logprobs,
//     stream, stream_options.include_usage.
//   - GET /v1/models.
//   - GET /healthz: "ok", as the proxy answers it.
//
// BOS precedes every prompt; prompt_tokens in usage counts it. Generation
// ends at EOS (or BOS, which this model uses between stories), a stop
// string, max_tokens or the context length. Log-probabilities are those of
// the model's distribution (temperature 1), whatever the sampling settings.
//
// Chat template: each message becomes "Role: content\n" with Role one of
// System, User or Assistant (the role capitalized), and the prompt ends with
// "Assistant:"; one leading space of the reply is dropped.
//
// Unknown request fields are ignored; malformed ones get 400 with the body
// {"error":{"message","type","param","code"}}. GET /healthz answers "ok"
// as the proxy does. Streams are server-sent events,
// "data: {json}\n\n" each flushed, ending with "data: [DONE]\n\n". A request
// whose context ends stops generating at the next token.
func NewHandler(m *Model, opts HandlerOptions) http.Handler {
	h := &handler{m: m, name: opts.Name, maxBody: opts.MaxBodyBytes, now: opts.Now}
	if h.name == "" {
		h.name = DefaultName
	}
	if h.maxBody == 0 {
		h.maxBody = 4 << 20
	}
	if h.now == nil {
		h.now = time.Now
	}
	workers := opts.Workers
	if workers <= 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	h.slots = make(chan struct{}, workers)
	h.eng = &engine{m: m}
	switch {
	case opts.PrefixCacheTokens == 0:
		h.eng.cache = newPrefixCache(1 << 16)
	case opts.PrefixCacheTokens > 0:
		h.eng.cache = newPrefixCache(opts.PrefixCacheTokens)
	}
	return h
}

func (h *handler) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	var method string
	var serve func(http.ResponseWriter, *http.Request)
	switch r.URL.Path {
	case "/v1/completions":
		method, serve = http.MethodPost, h.serveCompletions
	case "/v1/chat/completions":
		method, serve = http.MethodPost, h.serveChat
	case "/v1/models":
		method, serve = http.MethodGet, h.serveModels
	case "/healthz":
		method, serve = http.MethodGet, serveHealth
	default:
		writeError(w, http.StatusNotFound, "invalid_request_error", "unknown_url", fmt.Sprintf("no route for %s %s", r.Method, r.URL.Path))
		return
	}
	allow := method
	if method == http.MethodGet {
		allow = "GET, HEAD" // a GET route answers HEAD too, as net/http's mux does
	}
	if r.Method != method && !(method == http.MethodGet && r.Method == http.MethodHead) {
		w.Header().Set("Allow", allow)
		writeError(w, http.StatusMethodNotAllowed, "invalid_request_error", "method_not_allowed",
			fmt.Sprintf("%s is not allowed on %s; use %s", r.Method, r.URL.Path, strings.ReplaceAll(allow, ", ", " or ")))
		return
	}
	serve(w, r)
}

// serveHealth answers GET /healthz as the proxy does: the process is up.
func serveHealth(w http.ResponseWriter, _ *http.Request) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	_, _ = io.WriteString(w, "ok\n")
}

func (h *handler) serveModels(w http.ResponseWriter, r *http.Request) {
	writeJSON(w, http.StatusOK, wire.ModelList{Object: "list", Data: []wire.Model{{ID: h.name, Object: "model", Created: 0, OwnedBy: "stint"}}})
}

// decode reads the JSON body into v, mapping failures to request errors.
func (h *handler) decode(w http.ResponseWriter, r *http.Request, v any) bool {
	body := http.MaxBytesReader(w, r.Body, h.maxBody)
	if err := json.NewDecoder(body).Decode(v); err != nil {
		var tooBig *http.MaxBytesError
		if errors.As(err, &tooBig) {
			writeError(w, http.StatusRequestEntityTooLarge, "invalid_request_error", "body_too_large",
				fmt.Sprintf("request body exceeds %d bytes", h.maxBody))
			return false
		}
		msg, param := describeJSONError(err)
		code := "invalid_json"
		if param != "" {
			code = "invalid_value"
		}
		writeParamError(w, http.StatusBadRequest, "invalid_request_error", code, param, msg)
		return false
	}
	return true
}

// begin takes a worker slot for a generation under a context of its own,
// whose cancel stops it (a stream's failed write calls it), and notes in c
// whether the answer streams and ends with a usage chunk. When ok is false
// it has answered the failure; otherwise the caller defers end.
func (h *handler) begin(w http.ResponseWriter, r *http.Request, c *common, stream bool, so *wire.StreamOptions) (ctx context.Context, cancel context.CancelFunc, end func(), ok bool) {
	c.stream = stream
	c.usage = so != nil && so.IncludeUsage
	ctx, cancel = context.WithCancel(r.Context())
	release, err := h.acquire(ctx)
	if err != nil {
		cancel()
		h.fail(w, err)
		return nil, nil, nil, false
	}
	return ctx, cancel, func() { release(); cancel() }, true
}

// failRun answers a generation's error: on its stream once that has
// started, else as an error answer.
func (h *handler) failRun(w http.ResponseWriter, es *eventStream, err error) {
	if es != nil && es.started {
		es.fail(err)
		return
	}
	h.fail(w, err)
}

// acquire waits for a worker slot; the returned func gives it back.
func (h *handler) acquire(ctx context.Context) (func(), error) {
	select {
	case h.slots <- struct{}{}:
	default:
		if h.waitHook != nil {
			h.waitHook()
		}
		select {
		case h.slots <- struct{}{}:
		case <-ctx.Done():
			return nil, ctx.Err()
		}
	}
	n := h.active.Add(1)
	for {
		old := h.maxActive.Load()
		if n <= old || h.maxActive.CompareAndSwap(old, n) {
			break
		}
	}
	return func() { h.active.Add(-1); <-h.slots }, nil
}

// common holds the validated settings shared by both endpoints.
type common struct {
	n      int
	stream bool
	usage  bool
	gp     genParams
}

func (h *handler) validate(maxTokens *int, defMax int, temperature, topP *float64, n *int, stopRaw json.RawMessage, seed *int64) (common, error) {
	c := common{n: 1, gp: genParams{maxTokens: defMax, temperature: 1, topP: 1, logprobs: -1}}
	if maxTokens != nil {
		if *maxTokens < 0 {
			return c, badParam("max_tokens", "max_tokens must be at least 0, got %d", *maxTokens)
		}
		c.gp.maxTokens = *maxTokens
	}
	if temperature != nil {
		if *temperature < 0 || *temperature > 2 {
			return c, badParam("temperature", "temperature must be between 0 and 2, got %v", *temperature)
		}
		c.gp.temperature = *temperature
	}
	if topP != nil {
		if *topP <= 0 || *topP > 1 {
			return c, badParam("top_p", "top_p must be above 0 and at most 1, got %v", *topP)
		}
		c.gp.topP = *topP
	}
	if n != nil {
		if *n < 1 || *n > maxChoices {
			return c, badParam("n", "n must be between 1 and %d, got %d", maxChoices, *n)
		}
		c.n = *n
	}
	stop, err := parseStop(stopRaw)
	if err != nil {
		return c, err
	}
	c.gp.stop = stop
	if seed != nil {
		s := uint64(*seed)
		c.gp.seed = &s
	}
	return c, nil
}

// withBOS tokenizes prompts and checks them against the context length.
func (h *handler) withBOS(texts []string, ids [][]int) ([][]int, error) {
	bos := h.m.tok.BOS()
	var out [][]int
	for _, t := range texts {
		out = append(out, append([]int{bos}, h.m.tok.Encode(t)...))
	}
	for i, p := range ids {
		for _, id := range p {
			if id < 0 || id >= h.m.cfg.VocabSize {
				return nil, badParam("prompt", "prompt %d has token id %d; ids are 0 to %d", i, id, h.m.cfg.VocabSize-1)
			}
		}
		out = append(out, append([]int{bos}, p...))
	}
	for i, p := range out {
		if len(p) > h.m.cfg.ContextLength {
			return nil, fmt.Errorf("%w: prompt %d has %d tokens with BOS; the context holds %d",
				ErrContextFull, i, len(p), h.m.cfg.ContextLength)
		}
	}
	return out, nil
}

func (h *handler) fail(w http.ResponseWriter, err error) {
	var re *requestError
	switch {
	case errors.As(err, &re):
		writeParamError(w, http.StatusBadRequest, "invalid_request_error", "invalid_value", re.param, re.msg)
	case errors.Is(err, errBadRequest):
		writeError(w, http.StatusBadRequest, "invalid_request_error", "invalid_value", err.Error())
	case errors.Is(err, ErrContextFull):
		writeError(w, http.StatusBadRequest, "invalid_request_error", "context_length_exceeded", err.Error())
	case errors.Is(err, context.Canceled), errors.Is(err, context.DeadlineExceeded):
		writeError(w, http.StatusServiceUnavailable, "server_error", "cancelled", "request ended before it was served: "+err.Error())
	default:
		writeError(w, http.StatusInternalServerError, "server_error", "internal_error", err.Error())
	}
}

func (h *handler) serveCompletions(w http.ResponseWriter, r *http.Request) {
	var req wire.CompletionRequest
	if !h.decode(w, r, &req) {
		return
	}
	c, err := h.validate(req.MaxTokens, defaultCompletionTokens, req.Temperature, req.TopP, req.N, req.Stop, req.Seed)
	if err != nil {
		h.fail(w, err)
		return
	}
	if req.Logprobs != nil {
		if *req.Logprobs < 0 || *req.Logprobs > h.m.cfg.VocabSize {
			h.fail(w, badParam("logprobs", "logprobs must be between 0 and %d (the vocabulary size), got %d", h.m.cfg.VocabSize, *req.Logprobs))
			return
		}
		c.gp.logprobs = *req.Logprobs
		c.gp.promptLogprobs = req.Echo
	}
	texts, ids, err := parsePrompt(req.Prompt)
	if err != nil {
		h.fail(w, err)
		return
	}
	prompts, err := h.withBOS(texts, ids)
	if err != nil {
		h.fail(w, err)
		return
	}
	if len(prompts)*c.n > maxChoices {
		h.fail(w, badRequest("%d prompts × n=%d exceeds %d choices", len(prompts), c.n, maxChoices))
		return
	}
	ctx, cancel, end, ok := h.begin(w, r, &c, req.Stream, req.StreamOptions)
	if !ok {
		return
	}
	defer end()

	id, created := "cmpl-"+newID(), h.now().Unix()
	resp := wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: h.name}
	var es *eventStream
	var emitPrompt func(*promptState, int)
	var emit func(*choice, delta)
	if c.stream {
		es = newEventStream(w, cancel)
		emitPrompt = func(ps *promptState, pi int) {
			if !req.Echo {
				return
			}
			text, starts := promptText(h.m, ps.tokens[1:])
			for j := 0; j < c.n; j++ {
				ch := wire.CompletionChoice{Text: text, Index: pi*c.n + j}
				if c.gp.logprobs >= 0 {
					ch.Logprobs = h.completionLogprobs(ps.lps, starts, 0)
				}
				es.send(wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: h.name, Choices: []wire.CompletionChoice{ch}})
			}
		}
		bases := make([]int, len(prompts)) // echoed prompt bytes before each reply
		if req.Echo {
			for i, p := range prompts {
				text, _ := promptText(h.m, p[1:])
				bases[i] = len(text)
			}
		}
		emit = func(ch *choice, d delta) {
			if d.text == "" && len(d.toks) == 0 && d.finish == "" {
				return
			}
			base := bases[ch.prompt]
			out := wire.CompletionChoice{Text: d.text, Index: ch.index}
			if c.gp.logprobs >= 0 {
				out.Logprobs = h.completionLogprobs(d.toks, d.starts, base)
			}
			if d.finish != "" {
				out.FinishReason = &d.finish
			}
			es.send(wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: h.name, Choices: []wire.CompletionChoice{out}})
		}
	}
	states, choices, err := h.eng.run(ctx, prompts, c.n, &c.gp, emitPrompt, emit)
	if err != nil {
		h.failRun(w, es, err)
		return
	}
	u := h.usage(states, choices)
	if c.stream {
		es.end(c.usage, wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: h.name, Choices: []wire.CompletionChoice{}, Usage: &u})
		return
	}
	for _, ch := range choices {
		ps := states[ch.prompt]
		var prefix string
		var lp *wire.CompletionLogprobs
		if req.Echo {
			var starts []int
			prefix, starts = promptText(h.m, ps.tokens[1:])
			if c.gp.logprobs >= 0 {
				lp = h.completionLogprobs(ps.lps, starts, 0)
			}
		}
		if c.gp.logprobs >= 0 {
			more := h.completionLogprobs(ch.toks, ch.starts, len(prefix))
			if lp == nil {
				lp = more
			} else {
				lp.Tokens = append(lp.Tokens, more.Tokens...)
				lp.TokenLogprobs = append(lp.TokenLogprobs, more.TokenLogprobs...)
				lp.TopLogprobs = append(lp.TopLogprobs, more.TopLogprobs...)
				lp.TextOffset = append(lp.TextOffset, more.TextOffset...)
			}
		}
		finish := ch.finish
		resp.Choices = append(resp.Choices, wire.CompletionChoice{Text: prefix + string(ch.text), Index: ch.index, Logprobs: lp, FinishReason: &finish})
	}
	resp.Usage = &u
	writeJSON(w, http.StatusOK, resp)
}

func (h *handler) usage(states []*promptState, choices []*choice) wire.Usage {
	var u wire.Usage
	for _, ps := range states {
		u.PromptTokens += len(ps.tokens)
	}
	for _, c := range choices {
		u.CompletionTokens += c.ntoks
	}
	u.TotalTokens = u.PromptTokens + u.CompletionTokens
	return u
}

// completionLogprobs renders tokens in the completions format, offsets
// shifted by base.
func (h *handler) completionLogprobs(toks []tokenLogprob, starts []int, base int) *wire.CompletionLogprobs {
	lp := &wire.CompletionLogprobs{Tokens: []string{}, TokenLogprobs: []*float64{}, TopLogprobs: []*wire.TopLogprobs{}, TextOffset: []int{}}
	for i, t := range toks {
		lp.Tokens = append(lp.Tokens, h.m.tok.Display(t.id))
		lp.TextOffset = append(lp.TextOffset, base+starts[i])
		if !t.valid {
			lp.TokenLogprobs = append(lp.TokenLogprobs, nil)
			lp.TopLogprobs = append(lp.TopLogprobs, nil)
			continue
		}
		v := t.lp
		lp.TokenLogprobs = append(lp.TokenLogprobs, &v)
		top := &wire.TopLogprobs{Tokens: make([]string, 0, len(t.top)), Logprobs: make([]float64, 0, len(t.top))}
		for _, a := range t.top {
			top.Tokens = append(top.Tokens, h.m.tok.Display(a.id))
			top.Logprobs = append(top.Logprobs, a.lp)
		}
		lp.TopLogprobs = append(lp.TopLogprobs, top)
	}
	return lp
}

// chatPrompt renders messages with the documented template.
func chatPrompt(msgs []wire.ChatMessage) (string, error) {
	if len(msgs) == 0 {
		return "", badRequest("messages must not be empty")
	}
	var b strings.Builder
	for i, m := range msgs {
		role := strings.ToLower(m.Role)
		switch role {
		case "system", "developer", "user", "assistant":
		default:
			return "", badRequest("messages[%d].role %q is not system, user or assistant", i, m.Role)
		}
		if role == "developer" {
			role = "system"
		}
		content, err := parseContent(m)
		if err != nil {
			return "", fmt.Errorf("messages[%d]: %w", i, err)
		}
		b.WriteString(strings.ToUpper(role[:1]) + role[1:] + ": " + content + "\n")
	}
	b.WriteString("Assistant:")
	return b.String(), nil
}

func (h *handler) serveChat(w http.ResponseWriter, r *http.Request) {
	var req wire.ChatRequest
	if !h.decode(w, r, &req) {
		return
	}
	maxTokens := req.MaxCompletionTokens
	if maxTokens == nil {
		maxTokens = req.MaxTokens
	}
	c, err := h.validate(maxTokens, h.m.cfg.ContextLength, req.Temperature, req.TopP, req.N, req.Stop, req.Seed)
	if err != nil {
		h.fail(w, err)
		return
	}
	c.gp.stripLead = true
	if req.TopLogprobs != nil {
		if !req.Logprobs {
			h.fail(w, badParam("top_logprobs", "top_logprobs requires logprobs: true"))
			return
		}
		if *req.TopLogprobs < 0 || *req.TopLogprobs > h.m.cfg.VocabSize {
			h.fail(w, badParam("top_logprobs", "top_logprobs must be between 0 and %d (the vocabulary size), got %d", h.m.cfg.VocabSize, *req.TopLogprobs))
			return
		}
	}
	if req.Logprobs {
		c.gp.logprobs = 0
		if req.TopLogprobs != nil {
			c.gp.logprobs = *req.TopLogprobs
		}
	}
	text, err := chatPrompt(req.Messages)
	if err != nil {
		h.fail(w, err)
		return
	}
	prompts, err := h.withBOS([]string{text}, nil)
	if err != nil {
		h.fail(w, err)
		return
	}
	ctx, cancel, end, ok := h.begin(w, r, &c, req.Stream, req.StreamOptions)
	if !ok {
		return
	}
	defer end()

	id, created := "chatcmpl-"+newID(), h.now().Unix()
	chunk := func(choices []wire.ChatChoice, u *wire.Usage) wire.ChatResponse {
		return wire.ChatResponse{ID: id, Object: "chat.completion.chunk", Created: created, Model: h.name, Choices: choices, Usage: u}
	}
	var es *eventStream
	var emitPrompt func(*promptState, int)
	var emit func(*choice, delta)
	if c.stream {
		es = newEventStream(w, cancel)
		emitPrompt = func(_ *promptState, _ int) {
			empty := ""
			for j := 0; j < c.n; j++ {
				es.send(chunk([]wire.ChatChoice{{Index: j, Delta: &wire.ChatDelta{Role: "assistant", Content: &empty}}}, nil))
			}
		}
		emit = func(ch *choice, d delta) {
			if d.text == "" && len(d.toks) == 0 && d.finish == "" {
				return
			}
			out := wire.ChatChoice{Index: ch.index, Delta: &wire.ChatDelta{}}
			if d.text != "" {
				t := d.text
				out.Delta.Content = &t
			}
			if c.gp.logprobs >= 0 {
				out.Logprobs = h.chatLogprobs(d.toks)
			}
			if d.finish != "" {
				out.FinishReason = &d.finish
			}
			es.send(chunk([]wire.ChatChoice{out}, nil))
		}
	}
	states, choices, err := h.eng.run(ctx, prompts, c.n, &c.gp, emitPrompt, emit)
	if err != nil {
		h.failRun(w, es, err)
		return
	}
	u := h.usage(states, choices)
	if c.stream {
		es.end(c.usage, chunk([]wire.ChatChoice{}, &u))
		return
	}
	resp := wire.ChatResponse{ID: id, Object: "chat.completion", Created: created, Model: h.name, Usage: &u}
	for _, ch := range choices {
		finish := ch.finish
		out := wire.ChatChoice{Index: ch.index, Message: &wire.ChatAnswer{Role: "assistant", Content: string(ch.text)}, FinishReason: &finish}
		if c.gp.logprobs >= 0 {
			out.Logprobs = h.chatLogprobs(ch.toks)
		}
		resp.Choices = append(resp.Choices, out)
	}
	writeJSON(w, http.StatusOK, resp)
}

func (h *handler) chatLogprobs(toks []tokenLogprob) *wire.ChatLogprobs {
	out := &wire.ChatLogprobs{Content: []wire.ChatTokenLogprob{}}
	for _, t := range toks {
		e := wire.ChatTokenLogprob{Token: h.m.tok.Display(t.id), Logprob: t.lp, Bytes: wire.TokenBytes(string(h.m.tok.Bytes(t.id))), TopLogprobs: []wire.ChatTopLogprob{}}
		for _, a := range t.top {
			e.TopLogprobs = append(e.TopLogprobs, wire.ChatTopLogprob{Token: h.m.tok.Display(a.id), Logprob: a.lp, Bytes: wire.TokenBytes(string(h.m.tok.Bytes(a.id)))})
		}
		out.Content = append(out.Content, e)
	}
	return out
}

func newID() string {
	var b [12]byte
	_, _ = rand.Read(b[:])
	return hex.EncodeToString(b[:])
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		status = http.StatusInternalServerError
		b, _ = json.Marshal(wire.NewError("server_error", "internal_error", "", err.Error()))
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(status)
	_, _ = w.Write(append(b, '\n'))
}

// writeError writes the wire format's error body
// {"error":{"message","type","param","code"}}, param null.
func writeError(w http.ResponseWriter, status int, typ, code, msg string) {
	writeParamError(w, status, typ, code, "", msg)
}

// writeParamError is writeError naming the field at fault (param; "" for
// null).
func writeParamError(w http.ResponseWriter, status int, typ, code, param, msg string) {
	writeJSON(w, status, wire.NewError(typ, code, param, msg))
}

// eventStream is a streamed answer: its events go out through an
// sse.Writer, each flushed at once. A failed write cancels the request so
// generation stops.
type eventStream struct {
	w       http.ResponseWriter
	sw      *sse.Writer
	cancel  context.CancelFunc
	started bool
	failed  bool
}

func newEventStream(w http.ResponseWriter, cancel context.CancelFunc) *eventStream {
	return &eventStream{w: w, sw: sse.NewWriter(w), cancel: cancel}
}

// write sends one event of data, setting the stream's headers first.
func (s *eventStream) write(data []byte) {
	if s.failed {
		return
	}
	if !s.started {
		s.started = true
		sse.SetHeaders(s.w.Header())
		s.w.WriteHeader(http.StatusOK)
	}
	if err := s.sw.WriteData(data); err != nil {
		s.failed = true
		s.cancel()
	}
}

func (s *eventStream) send(v any) {
	b, err := json.Marshal(v)
	if err != nil {
		s.fail(err)
		return
	}
	s.write(b)
}

// fail reports an error after the stream has started (no [DONE] follows).
func (s *eventStream) fail(err error) {
	b, _ := json.Marshal(wire.NewError("server_error", "stream_error", "", err.Error()))
	s.write(b)
}

func (s *eventStream) done() { s.write([]byte(sse.Done)) }

// end ends the stream: the usage chunk when withUsage, then [DONE].
func (s *eventStream) end(withUsage bool, usageChunk any) {
	if withUsage {
		s.send(usageChunk)
	}
	s.done()
}
