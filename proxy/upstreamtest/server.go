// Package upstreamtest runs an in-test stand-in for the paid language-model
// API: an HTTP server on a loopback port that speaks the completions wire
// format faithfully and counts what reaches it. It is the only fake stint's
// tests use; everything else in them is real.
//
// Like net/http/httptest, New starts the server and Close stops it:
//
//	up := upstreamtest.New(upstreamtest.Options{Key: "up-key"})
//	defer up.Close()
//	// point the proxy at up.URL(), send requests, then check up.Calls()
//
// # Endpoints
//
// POST /v1/completions takes "prompt" as a string, an array of strings, an
// array of token ids, or an array of arrays of token ids (ids index the
// vocabulary, 0 to 270); "max_tokens" (default 16, 0 allowed, for scoring a
// prompt with "echo"), "temperature" (0 to 2, default 1), "top_p", "n" (1 to
// 128), "seed", "stop" (a string or up to four), "logprobs" (0 to 20, null
// for none), "echo", "stream" and "stream_options.include_usage". POST
// /v1/chat/completions takes "messages", "max_completion_tokens" or
// "max_tokens" (default 64), the same sampling fields, "logprobs" (bool) and
// "top_logprobs" (0 to 20, needs "logprobs"). GET /v1/models lists the
// models and GET /v1/models/{id} describes one. Unknown request fields are
// accepted and ignored. Errors use the wire format's shape,
// {"error":{"message","type","param","code"}}: 400 for bad JSON, wrong types,
// out-of-range values or a missing model, 404 with code "model_not_found"
// for a model not in Options.Models, 401 with code "invalid_api_key" when
// Options.Key is set and the request does not carry "Authorization: Bearer
// <Key>". Answers carry Content-Type and an x-request-id header.
//
// # The toy model
//
// Answers come from a deterministic hash model over a vocabulary of 265
// invented words about a cooperative of beekeepers who move their hives along
// a river on barges, plus six punctuation marks. Tokens are words with a
// leading space, as in byte-pair tokenizers; a prompt's tokens are its words
// and punctuation marks, each with the white space before it. At each
// position the model ranks 20 candidate tokens with log-probabilities that
// decrease strictly and whose probabilities sum to less than one; the
// candidates depend only on the model name and the tokens so far. Hence:
//
//   - temperature 0 picks the top candidate: the same prompt always gets the
//     same answer, and the first N tokens of a longer answer are the N-token
//     answer (the greedy prefix property);
//   - temperature above 0 samples (with top_p) from a generator seeded by
//     "seed" when given, else by a per-call counter, so unseeded sampled calls
//     differ from call to call and seeded ones repeat;
//   - after a sentence-ending mark the model sometimes ends on its own
//     (finish_reason "stop"); a stop sequence cuts the text at the token
//     boundary before the token in which it begins (finish_reason "stop");
//     otherwise the answer has max_tokens tokens (finish_reason "length");
//   - log-probability data are consistent: tokens concatenate to the text,
//     text_offset counts from the start of the returned text (echoed prompt
//     included), top_logprobs hold exactly k entries whose largest is the
//     chosen token at temperature 0, and every log-probability is negative;
//   - choice i*n+j answers prompt i of an array, sample j; usage counts the
//     prompt tokens (summed over the array's prompts, once each) and the
//     generated tokens (echo excluded).
//
// Streaming sends one chunk per token and choice, the choices interleaved,
// then a chunk with each choice's finish_reason, a usage chunk with empty
// choices when stream_options.include_usage is set, and "data: [DONE]".
//
// # Faults and holding calls
//
// FailNext and FailRatio inject faults (a status and body with an optional
// Retry-After, a hang until the client gives up, a delay, a reset
// connection, an answer cut short, or one that echoes the caller's
// Authorization header), and Block and Release hold calls in
// flight so a test can line up concurrent callers deterministically.
// MaxConcurrent reports the most calls served at once, for checking a
// client's concurrency cap.
package upstreamtest

import (
	"context"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"slices"
	"strings"
	"sync"
	"sync/atomic"

	"github.com/stintlab/stint/proxy/wire"
)

// Names of the fake's default models.
const (
	ModelSmall = "quill-small"
	ModelLarge = "quill-large"
)

// Paths of the endpoints the fake serves.
const (
	PathCompletions = "/v1/completions"
	PathChat        = "/v1/chat/completions"
	PathModels      = "/v1/models"
)

// maxBody bounds the request bodies the fake reads.
const maxBody = 64 << 20

// DefaultModels returns the models a Server serves when Options.Models is
// empty: ModelSmall and ModelLarge.
func DefaultModels() []string { return []string{ModelSmall, ModelLarge} }

// Options configure a Server. The zero value is a server without a key
// serving the default models.
type Options struct {
	// Key, when set, is the only credential accepted: requests must
	// carry "Authorization: Bearer <Key>", or get 401. Empty accepts any.
	Key string
	// Models are the model ids served; a request naming another gets 404
	// model_not_found. Empty means DefaultModels().
	Models []string
}

// Calls counts the requests that reached a Server, by endpoint. Requests
// that were then refused (bad input, wrong key, an injected fault) count.
type Calls struct {
	Completions int // POST /v1/completions
	Chat        int // POST /v1/chat/completions
	Models      int // GET /v1/models and /v1/models/{id}
	Other       int // any other path
}

// Total returns the number of requests of every kind.
func (c Calls) Total() int { return c.Completions + c.Chat + c.Models + c.Other }

// Request is a copy of a request that reached a Server.
type Request struct {
	Method string
	Path   string
	Header http.Header
	Body   []byte
}

// Server is a running fake upstream. Its methods are safe for concurrent
// use.
type Server struct {
	ts      *httptest.Server
	key     string
	models  map[string]*model
	order   []string // model ids in Options order
	nonce   uint64   // distinguishes this server's ids and unseeded samples
	closing chan struct{}
	once    sync.Once

	ids     atomic.Uint64 // response and request ids
	samples atomic.Uint64 // per-call counter for unseeded sampling
	active  atomic.Int64  // requests being served now
	peak    atomic.Int64  // most requests served at once since start or Reset

	// mu guards the fields below.
	mu       sync.Mutex
	calls    Calls
	prompts  int
	billed   Tokens
	requests []Request
	faults   []*faultRule
	blocked  bool
	gate     chan struct{} // closed by Release
	held     int
	heldMove chan struct{} // closed and replaced whenever held changes
}

// New starts a Server on a loopback port.
func New(opts Options) *Server {
	names := opts.Models
	if len(names) == 0 {
		names = DefaultModels()
	}
	s := &Server{
		key:      opts.Key,
		models:   make(map[string]*model, len(names)),
		order:    slices.Clone(names),
		nonce:    rand.Uint64(),
		closing:  make(chan struct{}),
		heldMove: make(chan struct{}),
	}
	for _, n := range names {
		s.models[n] = newModel(n)
	}
	s.ts = httptest.NewServer(http.HandlerFunc(s.serveHTTP))
	return s
}

// URL returns the base URL client libraries take, including the version
// path: "http://127.0.0.1:PORT/v1".
func (s *Server) URL() string { return s.ts.URL + "/v1" }

// Close releases held and hanging calls and shuts the server down,
// waiting for in-flight requests to finish.
func (s *Server) Close() {
	s.once.Do(func() { close(s.closing) })
	s.ts.Close()
}

// Calls returns the number of requests that have reached the server since
// it started or since Reset, by endpoint.
func (s *Server) Calls() Calls {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.calls
}

// Prompts returns the number of prompts the model has answered since the
// server started or since Reset: each element of an array prompt counts,
// and a chat call counts one. Refused and faulted requests count none.
func (s *Server) Prompts() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.prompts
}

// Requests returns copies of the requests that have reached the server, in
// arrival order.
func (s *Server) Requests() []Request {
	s.mu.Lock()
	defer s.mu.Unlock()
	out := make([]Request, len(s.requests))
	for i, r := range s.requests {
		out[i] = Request{Method: r.Method, Path: r.Path, Header: r.Header.Clone(), Body: slices.Clone(r.Body)}
	}
	return out
}

// MaxConcurrent returns the most requests the server was serving at the
// same time since it started or since Reset.
func (s *Server) MaxConcurrent() int { return int(s.peak.Load()) }

// enter counts a request in and raises the high-water mark; the returned
// function counts it out.
func (s *Server) enter() func() {
	n := s.active.Add(1)
	for {
		p := s.peak.Load()
		if n <= p || s.peak.CompareAndSwap(p, n) {
			break
		}
	}
	return func() { s.active.Add(-1) }
}

// Reset zeroes the counters and forgets the recorded requests and every
// pending fault. It does not release held calls.
func (s *Server) Reset() {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.peak.Store(s.active.Load())
	s.calls = Calls{}
	s.prompts = 0
	s.billed = Tokens{}
	s.requests = nil
	s.faults = nil
}

// Block makes calls that arrive from now on wait, after being counted and
// recorded, until Release (or until their client gives up, or Close).
func (s *Server) Block() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if !s.blocked {
		s.blocked = true
		s.gate = make(chan struct{})
	}
}

// Release lets every held call proceed and stops holding new ones.
func (s *Server) Release() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.blocked {
		s.blocked = false
		close(s.gate)
	}
}

// Held returns the number of calls waiting for Release.
func (s *Server) Held() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.held
}

// AwaitHeld waits until exactly n calls are held, or ctx ends. With n 0
// it waits for held calls to leave (after Release, or when their clients
// give up).
func (s *Server) AwaitHeld(ctx context.Context, n int) error {
	for {
		s.mu.Lock()
		held, moved := s.held, s.heldMove
		s.mu.Unlock()
		if held == n {
			return nil
		}
		select {
		case <-moved:
		case <-ctx.Done():
			return fmt.Errorf("upstreamtest: waiting for %d held calls (have %d): %w", n, held, ctx.Err())
		}
	}
}

// addHeldLocked changes the held count and wakes AwaitHeld.
func (s *Server) addHeldLocked(d int) {
	s.held += d
	close(s.heldMove)
	s.heldMove = make(chan struct{})
}

// hold waits at the gate if calls are blocked.
func (s *Server) hold(ctx context.Context) {
	s.mu.Lock()
	if !s.blocked {
		s.mu.Unlock()
		return
	}
	gate := s.gate
	s.addHeldLocked(1)
	s.mu.Unlock()
	select {
	case <-gate:
	case <-ctx.Done():
	case <-s.closing:
	}
	s.mu.Lock()
	s.addHeldLocked(-1)
	s.mu.Unlock()
}

func (s *Server) newID(prefix string) string {
	return fmt.Sprintf("%s%012x%012x", prefix, s.nonce&0xffffffffffff, s.ids.Add(1))
}

func (s *Server) serveHTTP(w http.ResponseWriter, r *http.Request) {
	defer s.enter()()
	body, err := io.ReadAll(io.LimitReader(r.Body, maxBody))
	if err != nil {
		http.Error(w, "reading body: "+err.Error(), http.StatusBadRequest)
		return
	}
	s.mu.Lock()
	switch {
	case r.URL.Path == PathCompletions:
		s.calls.Completions++
	case r.URL.Path == PathChat:
		s.calls.Chat++
	case r.URL.Path == PathModels || strings.HasPrefix(r.URL.Path, PathModels+"/"):
		s.calls.Models++
	default:
		s.calls.Other++
	}
	s.requests = append(s.requests, Request{Method: r.Method, Path: r.URL.Path, Header: r.Header.Clone(), Body: body})
	s.mu.Unlock()

	s.hold(r.Context())
	w.Header().Set("x-request-id", s.newID("req_"))

	f := s.nextFault(r.URL.Path)
	if f != nil && !s.applyFault(w, r, f) {
		return
	}
	out := responder{w: w}
	if f != nil {
		out.cut = f.Cut
	}

	if s.key != "" && r.Header.Get("Authorization") != "Bearer "+s.key {
		writeError(w, (&apiError{status: http.StatusUnauthorized, body: wire.ErrorDetail{
			Message: "Incorrect API key provided.", Type: "invalid_request_error",
		}}).withCode("invalid_api_key"))
		return
	}
	switch {
	case r.URL.Path == PathCompletions && r.Method == http.MethodPost:
		s.completions(out, body)
	case r.URL.Path == PathChat && r.Method == http.MethodPost:
		s.chat(out, body)
	case r.URL.Path == PathModels && r.Method == http.MethodGet:
		s.listModels(out)
	case strings.HasPrefix(r.URL.Path, PathModels+"/") && r.Method == http.MethodGet:
		s.getModel(out, strings.TrimPrefix(r.URL.Path, PathModels+"/"))
	case r.URL.Path == PathCompletions || r.URL.Path == PathChat || r.URL.Path == PathModels:
		allow := http.MethodPost
		if r.URL.Path == PathModels {
			allow = http.MethodGet
		}
		w.Header().Set("Allow", allow)
		writeError(w, &apiError{status: http.StatusMethodNotAllowed, body: wire.ErrorDetail{
			Message: fmt.Sprintf("Method %s is not allowed for %s.", r.Method, r.URL.Path), Type: "invalid_request_error",
		}})
	default:
		writeError(w, &apiError{status: http.StatusNotFound, body: wire.ErrorDetail{
			Message: fmt.Sprintf("Invalid URL (%s %s)", r.Method, r.URL.Path), Type: "invalid_request_error",
		}})
	}
}

// modelFor returns the named model or a 404 model_not_found.
func (s *Server) modelFor(name string) (*model, *apiError) {
	m, ok := s.models[name]
	if !ok {
		return nil, (&apiError{status: http.StatusNotFound, body: wire.ErrorDetail{
			Message: fmt.Sprintf("The model '%s' does not exist or you do not have access to it.", name),
			Type:    "invalid_request_error",
		}}).withCode("model_not_found")
	}
	return m, nil
}

// countPrompts records n answered prompts and the tokens the answer
// bills.
func (s *Server) countPrompts(n, promptTokens, completionTokens int) {
	s.mu.Lock()
	s.prompts += n
	s.billed.Prompt += promptTokens
	s.billed.Completion += completionTokens
	s.mu.Unlock()
}

// Tokens are the tokens the server has answered, as a provider would bill
// them.
type Tokens struct {
	Prompt     int // prompt tokens, each prompt of an array once
	Completion int // generated tokens over all choices
}

// Billed returns the tokens of every answer generated since the server
// started or since Reset, counted by the server itself (the same numbers
// its usage objects report). A streamed answer counts in full once
// generated, even if its client hangs up before reading it all, as a
// provider's bill would.
func (s *Server) Billed() Tokens {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.billed
}

// modelsCreated is the fixed creation time the fake reports for its
// models: 2026-03-01T00:00:00Z in Unix seconds.
const modelsCreated = 1772323200

func (s *Server) listModels(out responder) {
	data := make([]wire.Model, 0, len(s.order))
	for _, n := range s.order {
		data = append(data, wire.Model{ID: n, Object: "model", Created: modelsCreated, OwnedBy: "river-apiary"})
	}
	out.json(http.StatusOK, wire.ModelList{Object: "list", Data: data})
}

func (s *Server) getModel(out responder, id string) {
	if _, err := s.modelFor(id); err != nil {
		writeError(out.w, err)
		return
	}
	out.json(http.StatusOK, wire.Model{ID: id, Object: "model", Created: modelsCreated, OwnedBy: "river-apiary"})
}

// samplingFor returns the sampler for one choice, or nil for greedy.
func (s *Server) samplingFor(st settings, call uint64, state uint64, index int) *sampling {
	if st.temperature == 0 {
		return nil
	}
	base := call
	if st.seed != nil {
		base = mix(uint64(*st.seed) ^ 0x5eed)
	}
	return &sampling{
		temperature: st.temperature,
		topP:        st.topP,
		rng:         rand.New(rand.NewPCG(mix(base^state), uint64(index))),
	}
}

// sampleCall returns this call's contribution to unseeded sampling.
func (s *Server) sampleCall() uint64 { return mix(s.nonce ^ s.samples.Add(1)) }
