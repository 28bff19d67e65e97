package scorer

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strings"
	"sync"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// Endpoint selects the wire-format endpoint a Client scores through.
type Endpoint string

// The endpoints.
const (
	Completions Endpoint = "completions"
	Chat        Endpoint = "chat"
)

// Options configure a Client. The zero value of each optional field selects
// its default.
type Options struct {
	// BaseURL is the API's base URL including its version path, as client
	// libraries take it ("http://127.0.0.1:8787/v1"). Required.
	BaseURL string
	// Key, when set, is sent as "Authorization: Bearer <Key>".
	Key string
	// Run, when set, is sent as the Stint-Run header so the proxy journals
	// the calls for replay.
	Run string
	// RunMode, when set, is sent as Stint-Run-Mode: "replay" answers every
	// call from the run's journal, never from upstream.
	RunMode string
	// Model is the model id sent in every request. Required.
	Model string
	// Endpoint is Completions (the default when empty) or Chat.
	Endpoint Endpoint
	// TopLogprobs is how many next-token log-probabilities to ask for; 0
	// means 20 (what hosted chat APIs commonly allow at most).
	TopLogprobs int
	// BatchSize bounds the texts in one completions call; 0 means 16.
	// Chat sends one text per call whatever it is.
	BatchSize int
	// Concurrency bounds calls in flight; 0 means 4.
	Concurrency int
	// MaxResponseBytes bounds an answer's body; 0 means 8 MiB.
	MaxResponseBytes int64
	// HTTPClient sends the requests; nil means http.DefaultClient.
	HTTPClient *http.Client
	// Now reads the clock for an HTTP-date Retry-After; nil means time.Now.
	Now func() time.Time
	// Memo, when set, keeps every answered call and answers a call it was
	// given an answer for (Memo.Give) without sending it.
	Memo *Memo
}

// Client scores texts. It is safe for concurrent use.
type Client struct {
	opts     Options
	endpoint string // full URL

	// mu guards inFlight (calls in flight now) and peak (the most seen at
	// once, read by tests).
	mu       sync.Mutex
	inFlight int
	peak     int
}

// New checks opts, fills its defaults and returns a Client.
func New(opts Options) (*Client, error) {
	o := opts
	if o.BaseURL == "" || o.Model == "" {
		return nil, errors.New("scorer: BaseURL and Model are required")
	}
	if o.TopLogprobs < 0 || o.BatchSize < 0 || o.Concurrency < 0 || o.MaxResponseBytes < 0 {
		return nil, errors.New("scorer: TopLogprobs, BatchSize, Concurrency and MaxResponseBytes must not be negative")
	}
	if o.TopLogprobs == 0 {
		o.TopLogprobs = 20
	}
	if o.BatchSize == 0 {
		o.BatchSize = 16
	}
	if o.Concurrency == 0 {
		o.Concurrency = 4
	}
	if o.MaxResponseBytes == 0 {
		o.MaxResponseBytes = 8 << 20
	}
	if o.HTTPClient == nil {
		o.HTTPClient = http.DefaultClient
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	base := strings.TrimRight(o.BaseURL, "/")
	c := &Client{opts: o}
	switch o.Endpoint {
	case "", Completions:
		c.opts.Endpoint = Completions
		c.endpoint = base + "/completions"
	case Chat:
		c.endpoint = base + "/chat/completions"
		c.opts.BatchSize = 1
	default:
		return nil, fmt.Errorf("scorer: endpoint %q is not %q or %q", o.Endpoint, Completions, Chat)
	}
	return c, nil
}

// Result is what Score found.
type Result struct {
	// Top[i] maps token → log-probability of the next token after text i,
	// the k most likely as the API returned them.
	Top []map[string]float64
	// Calls lists the HTTP calls made, in the order of the texts they
	// covered.
	Calls []Call
}

// Score asks for the next-token log-probabilities after each text, in
// batches (completions) or one call per text (chat), with at most
// Options.Concurrency calls in flight. After the first failing call no
// more are sent, the calls in flight finish (so an answer already being paid
// for reaches Options.Memo) and the first error is returned; ctx ending
// cancels them all.
func (c *Client) Score(ctx context.Context, texts []string) (Result, error) {
	n := c.opts.BatchSize
	var batches [][]string
	for i := 0; i < len(texts); i += n {
		batches = append(batches, texts[i:min(i+n, len(texts))])
	}
	res := Result{Top: make([]map[string]float64, 0, len(texts)), Calls: make([]Call, len(batches))}
	tops := make([][]map[string]float64, len(batches))

	// failed is closed by the first failing call; first is its error.
	failed := make(chan struct{})
	var once sync.Once
	var first error
	fail := func(err error) {
		once.Do(func() { first = err; close(failed) })
	}
	slots := make(chan struct{}, c.opts.Concurrency)
	var wg sync.WaitGroup
launch:
	for i, b := range batches {
		select {
		case slots <- struct{}{}:
		case <-ctx.Done():
			break launch
		case <-failed:
			break launch
		}
		select {
		case <-failed:
			<-slots
			break launch
		default:
		}
		wg.Add(1)
		go func() {
			defer wg.Done()
			defer func() { <-slots }()
			top, call, err := c.answer(ctx, b)
			if err != nil {
				fail(fmt.Errorf("texts %d to %d: %w", i*n, i*n+len(b)-1, err))
				return
			}
			tops[i], res.Calls[i] = top, call
		}()
	}
	wg.Wait()
	if first != nil {
		return Result{}, first
	}
	if err := ctx.Err(); err != nil {
		return Result{}, err
	}
	for _, t := range tops {
		res.Top = append(res.Top, t...)
	}
	return res, nil
}

// answer answers texts from the memo when it was given an answer for them,
// else by a call, which the memo keeps.
func (c *Client) answer(ctx context.Context, texts []string) ([]map[string]float64, Call, error) {
	m := c.opts.Memo
	if m == nil {
		return c.call(ctx, texts)
	}
	key := AnswerKey(texts)
	if a, ok := m.take(key); ok {
		return a.Top, a.Call, nil
	}
	top, call, err := c.call(ctx, texts)
	if err == nil {
		m.keep(Answer{Key: key, Top: top, Call: call})
	}
	return top, call, err
}

// requestBody is the body of one call for texts: one token, greedy, with
// the top log-probabilities of its place.
func (c *Client) requestBody(texts []string) ([]byte, error) {
	one, greedy, top := 1, 0.0, c.opts.TopLogprobs
	if c.opts.Endpoint == Chat {
		return json.Marshal(wire.ChatRequest{Model: c.opts.Model, Messages: []wire.ChatMessage{wire.TextMessage("user", texts[0])},
			MaxTokens: &one, Temperature: &greedy, Logprobs: true, TopLogprobs: &top})
	}
	prompt, err := json.Marshal(texts)
	if err != nil {
		return nil, err
	}
	return json.Marshal(wire.CompletionRequest{Model: c.opts.Model, Prompt: prompt, MaxTokens: &one, Temperature: &greedy, Logprobs: &top})
}

// call makes one HTTP call for texts.
func (c *Client) call(ctx context.Context, texts []string) ([]map[string]float64, Call, error) {
	c.enter()
	defer c.leave()
	raw, err := c.requestBody(texts)
	if err != nil {
		return nil, Call{}, fmt.Errorf("scorer: encoding request: %w", err)
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, c.endpoint, bytes.NewReader(raw))
	if err != nil {
		return nil, Call{}, fmt.Errorf("scorer: %w", err)
	}
	req.Header.Set("Content-Type", "application/json")
	if c.opts.Key != "" {
		req.Header.Set("Authorization", "Bearer "+c.opts.Key)
	}
	if c.opts.Run != "" {
		req.Header.Set(HeaderRun, c.opts.Run)
	}
	if c.opts.RunMode != "" {
		req.Header.Set(HeaderRunMode, c.opts.RunMode)
	}
	resp, err := c.opts.HTTPClient.Do(req)
	if err != nil {
		return nil, Call{}, fmt.Errorf("scorer: POST %s: %w", c.endpoint, err)
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(io.LimitReader(resp.Body, c.opts.MaxResponseBytes+1))
	if err != nil {
		return nil, Call{}, fmt.Errorf("scorer: reading answer: %w", err)
	}
	if int64(len(data)) > c.opts.MaxResponseBytes {
		return nil, Call{}, fmt.Errorf("%w: more than %d bytes (status %d)", ErrTooLarge, c.opts.MaxResponseBytes, resp.StatusCode)
	}
	if resp.StatusCode != http.StatusOK {
		return nil, Call{}, c.apiError(resp, data)
	}
	call := readCall(resp.Header, len(texts))
	var tops []map[string]float64
	var usage *Usage
	if c.opts.Endpoint == Chat {
		tops, usage, err = decodeChat(data)
	} else {
		tops, usage, err = decodeCompletions(data, len(texts))
	}
	if err != nil {
		return nil, Call{}, err
	}
	if usage != nil {
		call.Usage = *usage
	}
	return tops, call, nil
}

func (c *Client) enter() {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.inFlight++
	c.peak = max(c.peak, c.inFlight)
}

func (c *Client) leave() {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.inFlight--
}
