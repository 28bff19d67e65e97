// Package wire holds the types of the completions wire format
// (POST /v1/completions, POST /v1/chat/completions, GET /v1/models and the
// error body) as every part of stint writes and reads them: the proxy, the
// local model's server, the in-test upstream and the search's scoring
// client.
//
// It imports nothing of stint, so any package, the leaf proxy/localmodel
// included, may use it. Optional request fields whose zero value means
// something (temperature 0, logprobs 0) are pointers; they are left out of
// an encoded request when nil.
package wire

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
)

// Usage is an answer's token accounting.
type Usage struct {
	PromptTokens     int `json:"prompt_tokens"`
	CompletionTokens int `json:"completion_tokens"`
	TotalTokens      int `json:"total_tokens"`
}

// NewUsage is the usage of prompt and completion tokens, with their total.
func NewUsage(prompt, completion int) Usage {
	return Usage{PromptTokens: prompt, CompletionTokens: completion, TotalTokens: prompt + completion}
}

// Add is the sum of u and o, field by field.
func (u Usage) Add(o Usage) Usage {
	return Usage{u.PromptTokens + o.PromptTokens, u.CompletionTokens + o.CompletionTokens, u.TotalTokens + o.TotalTokens}
}

// StreamOptions is a request's stream_options object.
type StreamOptions struct {
	IncludeUsage bool `json:"include_usage"`
}

// CompletionRequest is a POST /v1/completions body. Prompt is a string, an
// array of strings, an array of token ids or an array of token-id arrays,
// kept raw for the reader to tell apart; Stop is null, a string or an array
// of strings.
type CompletionRequest struct {
	Model         string          `json:"model"`
	Prompt        json.RawMessage `json:"prompt,omitempty"`
	MaxTokens     *int            `json:"max_tokens,omitempty"`
	Temperature   *float64        `json:"temperature,omitempty"`
	TopP          *float64        `json:"top_p,omitempty"`
	N             *int            `json:"n,omitempty"`
	Stream        bool            `json:"stream,omitempty"`
	StreamOptions *StreamOptions  `json:"stream_options,omitempty"`
	Logprobs      *int            `json:"logprobs,omitempty"`
	Echo          bool            `json:"echo,omitempty"`
	Stop          json.RawMessage `json:"stop,omitempty"`
	Seed          *int64          `json:"seed,omitempty"`
}

// ChatMessage is one message of a chat request. Content is a string, null
// or an array of content parts, kept raw for the reader to tell apart.
type ChatMessage struct {
	Role    string          `json:"role"`
	Content json.RawMessage `json:"content"`
}

// TextMessage is a chat message whose content is the string text.
func TextMessage(role, text string) ChatMessage {
	b, _ := json.Marshal(text) // a string always encodes
	return ChatMessage{Role: role, Content: b}
}

// ChatRequest is a POST /v1/chat/completions body.
type ChatRequest struct {
	Model               string          `json:"model"`
	Messages            []ChatMessage   `json:"messages"`
	MaxTokens           *int            `json:"max_tokens,omitempty"`
	MaxCompletionTokens *int            `json:"max_completion_tokens,omitempty"`
	Temperature         *float64        `json:"temperature,omitempty"`
	TopP                *float64        `json:"top_p,omitempty"`
	N                   *int            `json:"n,omitempty"`
	Stream              bool            `json:"stream,omitempty"`
	StreamOptions       *StreamOptions  `json:"stream_options,omitempty"`
	Logprobs            bool            `json:"logprobs,omitempty"`
	TopLogprobs         *int            `json:"top_logprobs,omitempty"`
	Stop                json.RawMessage `json:"stop,omitempty"`
	Seed                *int64          `json:"seed,omitempty"`
}

// CompletionResponse is a completions answer, or one chunk of a streamed
// one (then Usage is nil but on the last chunk, when asked for).
type CompletionResponse struct {
	ID      string             `json:"id"`
	Object  string             `json:"object"`
	Created int64              `json:"created"`
	Model   string             `json:"model"`
	Choices []CompletionChoice `json:"choices"`
	Usage   *Usage             `json:"usage,omitempty"`
}

// CompletionChoice is one choice of a completions answer.
type CompletionChoice struct {
	Text         string              `json:"text"`
	Index        int                 `json:"index"`
	Logprobs     *CompletionLogprobs `json:"logprobs"`
	FinishReason *string             `json:"finish_reason"`
}

// CompletionLogprobs is the completions format's logprobs object, one entry
// per token. Entries of TokenLogprobs and TopLogprobs are null for the first
// token of an echoed prompt.
type CompletionLogprobs struct {
	Tokens        []string       `json:"tokens"`
	TokenLogprobs []*float64     `json:"token_logprobs"`
	TopLogprobs   []*TopLogprobs `json:"top_logprobs"`
	TextOffset    []int          `json:"text_offset"`
}

// TopLogprobs is one position's top_logprobs object of the completions
// format: tokens and their log-probabilities, kept in the order they are
// written and read (the wire format lists the most likely first; a Go map
// would sort them by token).
type TopLogprobs struct {
	Tokens   []string
	Logprobs []float64
}

// Map is t as a map from token to log-probability.
func (t *TopLogprobs) Map() map[string]float64 {
	if t == nil {
		return nil
	}
	m := make(map[string]float64, len(t.Tokens))
	for i, tok := range t.Tokens {
		m[tok] = t.Logprobs[i]
	}
	return m
}

// Len is the number of entries of t (0 for nil).
func (t *TopLogprobs) Len() int {
	if t == nil {
		return 0
	}
	return len(t.Tokens)
}

// MarshalJSON writes t as one JSON object, its entries in order.
func (t *TopLogprobs) MarshalJSON() ([]byte, error) {
	if t == nil {
		return []byte("null"), nil
	}
	if len(t.Tokens) != len(t.Logprobs) {
		return nil, errors.New("wire: TopLogprobs has unequal Tokens and Logprobs")
	}
	b := []byte{'{'}
	for i, tok := range t.Tokens {
		if i > 0 {
			b = append(b, ',')
		}
		k, err := json.Marshal(tok)
		if err != nil {
			return nil, err
		}
		v, err := json.Marshal(t.Logprobs[i])
		if err != nil {
			return nil, err
		}
		b = append(append(append(b, k...), ':'), v...)
	}
	return append(b, '}'), nil
}

// UnmarshalJSON reads one JSON object of token: log-probability entries,
// keeping their order.
func (t *TopLogprobs) UnmarshalJSON(b []byte) error {
	d := json.NewDecoder(bytes.NewReader(b))
	if tok, err := d.Token(); err != nil || tok != json.Delim('{') {
		return errors.New("wire: top_logprobs entry is not an object")
	}
	t.Tokens, t.Logprobs = t.Tokens[:0], t.Logprobs[:0]
	for d.More() {
		k, err := d.Token()
		if err != nil {
			return err
		}
		var lp float64
		if err := d.Decode(&lp); err != nil {
			return err
		}
		t.Tokens = append(t.Tokens, k.(string))
		t.Logprobs = append(t.Logprobs, lp)
	}
	_, err := d.Token()
	return err
}

// ChatResponse is a chat answer (Object "chat.completion"), or one chunk
// of a streamed one ("chat.completion.chunk"; then Usage is nil but on the
// last chunk, when asked for).
type ChatResponse struct {
	ID                string       `json:"id"`
	Object            string       `json:"object"`
	Created           int64        `json:"created"`
	Model             string       `json:"model"`
	SystemFingerprint string       `json:"system_fingerprint,omitempty"`
	Choices           []ChatChoice `json:"choices"`
	Usage             *Usage       `json:"usage,omitempty"`
}

// ChatChoice is one choice of a chat answer: Message in a whole answer,
// Delta in a streamed chunk.
type ChatChoice struct {
	Index        int           `json:"index"`
	Message      *ChatAnswer   `json:"message,omitempty"`
	Delta        *ChatDelta    `json:"delta,omitempty"`
	Logprobs     *ChatLogprobs `json:"logprobs"`
	FinishReason *string       `json:"finish_reason"`
}

// ChatAnswer is the message of a whole chat answer.
type ChatAnswer struct {
	Role    string  `json:"role"`
	Content string  `json:"content"`
	Refusal *string `json:"refusal"`
}

// ChatDelta is what one streamed chunk adds to a chat answer's message.
type ChatDelta struct {
	Role    string  `json:"role,omitempty"`
	Content *string `json:"content,omitempty"`
}

// ChatLogprobs is the chat format's logprobs object, one entry per token.
type ChatLogprobs struct {
	Content []ChatTokenLogprob `json:"content"`
}

// ChatTokenLogprob is one token of a chat answer with its log-probability
// and the most likely tokens in its place.
type ChatTokenLogprob struct {
	Token       string           `json:"token"`
	Logprob     float64          `json:"logprob"`
	Bytes       []int            `json:"bytes"`
	TopLogprobs []ChatTopLogprob `json:"top_logprobs"`
}

// ChatTopLogprob is one of the most likely tokens at a position.
type ChatTopLogprob struct {
	Token   string  `json:"token"`
	Logprob float64 `json:"logprob"`
	Bytes   []int   `json:"bytes"`
}

// TokenBytes is t's UTF-8 bytes as the numbers the wire format writes in
// "bytes".
func TokenBytes(t string) []int {
	out := make([]int, len(t))
	for i := range len(t) {
		out[i] = int(t[i])
	}
	return out
}

// Model is one entry of GET /v1/models.
type Model struct {
	ID      string `json:"id"`
	Object  string `json:"object"`
	Created int64  `json:"created"`
	OwnedBy string `json:"owned_by"`
}

// ModelList is the answer of GET /v1/models (Object "list").
type ModelList struct {
	Object string  `json:"object"`
	Data   []Model `json:"data"`
}

// ErrorBody is the wire format's error answer:
// {"error":{"message","type","param","code"}}.
type ErrorBody struct {
	Error ErrorDetail `json:"error"`
}

// ErrorDetail is the error object of an ErrorBody. Param names the request
// field at fault (nil: none).
type ErrorDetail struct {
	Message string    `json:"message"`
	Type    string    `json:"type"`
	Param   *string   `json:"param"`
	Code    ErrorCode `json:"code"`
}

// NewError is the error body of message, type typ, code (""
// for null) and param ("" for null).
func NewError(typ, code, param, message string) ErrorBody {
	d := ErrorDetail{Message: message, Type: typ, Code: ErrorCode(code)}
	if param != "" {
		d.Param = &param
	}
	return ErrorBody{Error: d}
}

// ErrorCode is an error's code: written as a string, or null when empty;
// read from a string, a number (some APIs send one) or null.
type ErrorCode string

// MarshalJSON writes c as a JSON string, or null when c is empty.
func (c ErrorCode) MarshalJSON() ([]byte, error) {
	if c == "" {
		return []byte("null"), nil
	}
	return json.Marshal(string(c))
}

// UnmarshalJSON reads a string, a number (kept as written) or null.
func (c *ErrorCode) UnmarshalJSON(b []byte) error {
	b = bytes.TrimSpace(b)
	switch {
	case string(b) == "null":
		*c = ""
		return nil
	case len(b) > 0 && b[0] == '"':
		var s string
		if err := json.Unmarshal(b, &s); err != nil {
			return err
		}
		*c = ErrorCode(s)
		return nil
	}
	var n json.Number
	if err := json.Unmarshal(b, &n); err != nil {
		return errors.New("wire: error code is neither a string, a number nor null")
	}
	*c = ErrorCode(n.String())
	return nil
}

// ParseStop reads a request's stop field: null or absent (no stops), a
// string or an array of strings. ok is false for anything else. Limits on
// the count and on empty strings are the reader's.
func ParseStop(raw json.RawMessage) (stops []string, ok bool) {
	if len(raw) == 0 || string(raw) == "null" {
		return nil, true
	}
	var one string
	if json.Unmarshal(raw, &one) == nil {
		return []string{one}, true
	}
	if err := json.Unmarshal(raw, &stops); err != nil {
		return nil, false
	}
	return stops, true
}

// ContentError says why a message's content is not text.
type ContentError struct {
	// Part is the index of the content part that is not text, or -1 when
	// the content is neither a string, null nor an array of parts.
	Part int
	// Type is that part's type.
	Type string
}

func (e *ContentError) Error() string {
	if e.Part < 0 {
		return "wire: message content is not a string or an array of content parts"
	}
	return fmt.Sprintf("wire: message content part %d has type %q, not text", e.Part, e.Type)
}

// Text is the message's content as text: a string, "" for null, or the
// texts of an array of {"type":"text","text":…} parts joined. Other
// content is a *ContentError.
func (m ChatMessage) Text() (string, error) {
	raw := m.Content
	if len(raw) == 0 || string(raw) == "null" {
		return "", nil
	}
	var s string
	if json.Unmarshal(raw, &s) == nil {
		return s, nil
	}
	var parts []struct {
		Type string `json:"type"`
		Text string `json:"text"`
	}
	if err := json.Unmarshal(raw, &parts); err != nil {
		return "", &ContentError{Part: -1}
	}
	var b strings.Builder
	for i, p := range parts {
		if p.Type != "text" {
			return "", &ContentError{Part: i, Type: p.Type}
		}
		b.WriteString(p.Text)
	}
	return b.String(), nil
}
