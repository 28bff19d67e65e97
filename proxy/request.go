package proxy

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"strconv"
)

// endpoint names one of the wire format's generation endpoints.
type endpoint string

const (
	endpointCompletions endpoint = "completions"
	endpointChat        endpoint = "chat/completions"
)

// Bounds beyond which a request is refused as absurd rather than forwarded.
const (
	maxMaxTokens = 1 << 20 // larger than any model's context window today
	maxLogprobs  = 1 << 18 // larger than any vocabulary in use (o200k has ~200k)
	maxN         = 128
)

// noLevel marks an absent optional integer (max_tokens, logprobs).
const noLevel = -1

// request is a decoded, validated generation request. fields keeps every
// member as sent, so unknown fields pass through untouched.
type request struct {
	endpoint endpoint
	raw      []byte
	fields   map[string]json.RawMessage

	model        string
	stream       bool
	includeUsage bool
	n            int
	temperature  float64 // 1 when absent, the wire format's default
	// maxTokens is max_tokens (or, for chat, max_completion_tokens); noLevel when absent.
	maxTokens int
	// logprobs is the number of top log-probabilities asked for: completions
	// `logprobs`; chat `top_logprobs` when `logprobs` is true (0 when true without
	// top_logprobs). noLevel when no log-probabilities are asked for.
	logprobs int
	echo     bool
	stop     bool // a stop sequence is set

	// prompts holds the completions prompt split into items: one entry for a
	// string or a token array, one per element for an array of those.
	prompts      []json.RawMessage
	promptsArray bool
}

// chatMaxTokensField reports which field carries the chat token cap.
func (r *request) maxTokensField() string {
	if r.endpoint == endpointChat {
		if _, ok := r.fields["max_completion_tokens"]; ok {
			return "max_completion_tokens"
		}
	}
	return "max_tokens"
}

// parseRequest decodes and validates body for ep. A completions prompt
// may have at most maxPrompts items (no cap when maxPrompts < 1).
func parseRequest(ep endpoint, body []byte, maxPrompts int) (*request, *apiError) {
	var fields map[string]json.RawMessage
	dec := json.NewDecoder(bytes.NewReader(body))
	if err := dec.Decode(&fields); err != nil {
		return nil, badRequest("", "request body is not a JSON object: %v", err)
	}
	if dec.More() {
		return nil, badRequest("", "request body has data after the JSON object")
	}
	if fields == nil {
		return nil, badRequest("", "request body must be a JSON object, not null")
	}
	if err := checkCanonical(body); err != nil {
		return nil, badRequest("", "request body is not I-JSON (RFC 8785 §3.1): %v", err)
	}
	r := &request{endpoint: ep, raw: body, fields: fields, n: 1, temperature: 1, maxTokens: noLevel, logprobs: noLevel}
	var e *apiError
	if r.model, e = requiredString(fields, "model"); e != nil {
		return nil, e
	}
	if r.stream, e = optBool(fields, "stream"); e != nil {
		return nil, e
	}
	if raw, ok := fields["stream_options"]; ok && !isNull(raw) {
		var so struct {
			IncludeUsage *bool `json:"include_usage"`
		}
		if err := json.Unmarshal(raw, &so); err != nil {
			return nil, badRequest("stream_options", "stream_options must be an object: %v", err)
		}
		r.includeUsage = so.IncludeUsage != nil && *so.IncludeUsage
	}
	if n, ok, e := optInt(fields, "n", 1, maxN); e != nil {
		return nil, e
	} else if ok {
		r.n = n
	}
	if t, ok, e := optNumber(fields, "temperature", 0, math.MaxFloat64); e != nil {
		return nil, e
	} else if ok {
		r.temperature = t
	}
	if _, _, e := optNumber(fields, "top_p", 0, 1); e != nil {
		return nil, e
	}
	if raw, ok := fields["stop"]; ok && !isNull(raw) {
		r.stop = true
	}
	switch ep {
	case endpointCompletions:
		if e := r.parseCompletions(maxPrompts); e != nil {
			return nil, e
		}
	case endpointChat:
		if e := r.parseChat(); e != nil {
			return nil, e
		}
	}
	return r, nil
}

func (r *request) parseCompletions(maxPrompts int) *apiError {
	if m, ok, e := optInt(r.fields, "max_tokens", 0, maxMaxTokens); e != nil {
		return e
	} else if ok {
		r.maxTokens = m
	}
	if lp, ok, e := optInt(r.fields, "logprobs", 0, maxLogprobs); e != nil {
		return e
	} else if ok {
		r.logprobs = lp
	}
	var e *apiError
	if r.echo, e = optBool(r.fields, "echo"); e != nil {
		return e
	}
	raw, ok := r.fields["prompt"]
	if !ok || isNull(raw) {
		return badRequest("prompt", "prompt is required")
	}
	r.prompts, r.promptsArray, e = splitPrompt(raw, maxPrompts)
	return e
}

func (r *request) parseChat() *apiError {
	raw, ok := r.fields["messages"]
	if !ok || isNull(raw) {
		return badRequest("messages", "messages is required")
	}
	var msgs []json.RawMessage
	if err := json.Unmarshal(raw, &msgs); err != nil {
		return badRequest("messages", "messages must be an array: %v", err)
	}
	if len(msgs) == 0 {
		return badRequest("messages", "messages must not be empty")
	}
	for i, m := range msgs {
		if len(m) == 0 || m[0] != '{' {
			return badRequest("messages", "messages[%d] must be an object", i)
		}
	}
	for _, f := range []string{"max_completion_tokens", "max_tokens"} {
		if m, ok, e := optInt(r.fields, f, 0, maxMaxTokens); e != nil {
			return e
		} else if ok {
			r.maxTokens = m
			break
		}
	}
	want, e := optBool(r.fields, "logprobs")
	if e != nil {
		return e
	}
	top, hasTop, e := optInt(r.fields, "top_logprobs", 0, maxLogprobs)
	if e != nil {
		return e
	}
	if hasTop && !want {
		return badRequest("top_logprobs", "top_logprobs requires logprobs to be true")
	}
	if want {
		r.logprobs = top
	}
	return nil
}

// splitPrompt splits a completions prompt into items. A string or an array of
// token ids is one prompt; an array of strings or of token arrays is several,
// at most maxPrompts of them (no cap when maxPrompts < 1): the count is
// checked before any item is.
func splitPrompt(raw json.RawMessage, maxPrompts int) ([]json.RawMessage, bool, *apiError) {
	raw = bytes.TrimSpace(raw)
	switch raw[0] {
	case '"':
		var s string
		if err := json.Unmarshal(raw, &s); err != nil {
			return nil, false, badRequest("prompt", "prompt is not a valid string: %v", err)
		}
		return []json.RawMessage{raw}, false, nil
	case '[':
	default:
		return nil, false, badRequest("prompt", "prompt must be a string, an array of strings, an array of token ids or an array of token-id arrays")
	}
	var items []json.RawMessage
	if err := json.Unmarshal(raw, &items); err != nil {
		return nil, false, badRequest("prompt", "prompt is not a valid array: %v", err)
	}
	if len(items) == 0 {
		return nil, false, badRequest("prompt", "prompt must not be an empty array")
	}
	if first := bytes.TrimSpace(items[0]); len(first) > 0 && (first[0] == '-' || (first[0] >= '0' && first[0] <= '9')) {
		if err := checkTokenIDs(raw); err != nil {
			return nil, false, badRequest("prompt", "prompt token array: %v", err)
		}
		return []json.RawMessage{raw}, false, nil
	}
	if maxPrompts > 0 && len(items) > maxPrompts {
		e := badRequest("prompt", "prompt has %d items; a request may have at most %d (server.max_prompts): send the batch in parts", len(items), maxPrompts)
		e.code = "too_many_prompts"
		return nil, false, e
	}
	for i, it := range items {
		it = bytes.TrimSpace(it)
		switch {
		case len(it) > 0 && it[0] == '"':
			var s string
			if err := json.Unmarshal(it, &s); err != nil {
				return nil, false, badRequest("prompt", "prompt[%d] is not a valid string: %v", i, err)
			}
		case len(it) > 0 && it[0] == '[':
			if err := checkTokenIDs(it); err != nil {
				return nil, false, badRequest("prompt", "prompt[%d]: %v", i, err)
			}
		default:
			return nil, false, badRequest("prompt", "prompt[%d] must be a string or an array of token ids", i)
		}
		items[i] = it
	}
	return items, true, nil
}

func checkTokenIDs(raw json.RawMessage) error {
	var ids []int64
	if err := json.Unmarshal(raw, &ids); err != nil {
		return fmt.Errorf("token ids must be integers: %w", err)
	}
	for _, id := range ids {
		if id < 0 {
			return fmt.Errorf("token id %d is negative", id)
		}
	}
	return nil
}

func isNull(raw json.RawMessage) bool {
	return bytes.Equal(bytes.TrimSpace(raw), []byte("null"))
}

func requiredString(fields map[string]json.RawMessage, name string) (string, *apiError) {
	raw, ok := fields[name]
	if !ok || isNull(raw) {
		return "", badRequest(name, "%s is required", name)
	}
	var s string
	if err := json.Unmarshal(raw, &s); err != nil {
		return "", badRequest(name, "%s must be a string", name)
	}
	if s == "" {
		return "", badRequest(name, "%s must not be empty", name)
	}
	return s, nil
}

func optBool(fields map[string]json.RawMessage, name string) (bool, *apiError) {
	raw, ok := fields[name]
	if !ok || isNull(raw) {
		return false, nil
	}
	var b bool
	if err := json.Unmarshal(raw, &b); err != nil {
		return false, badRequest(name, "%s must be a boolean", name)
	}
	return b, nil
}

// optInt reads an optional integer field within [lo, hi].
func optInt(fields map[string]json.RawMessage, name string, lo, hi int) (int, bool, *apiError) {
	raw, ok := fields[name]
	if !ok || isNull(raw) {
		return 0, false, nil
	}
	f, err := strconv.ParseFloat(string(bytes.TrimSpace(raw)), 64)
	if err != nil || f != math.Trunc(f) {
		return 0, false, badRequest(name, "%s must be an integer", name)
	}
	if f < float64(lo) || f > float64(hi) {
		return 0, false, badRequest(name, "%s must be between %d and %d, got %s", name, lo, hi, bytes.TrimSpace(raw))
	}
	return int(f), true, nil
}

// optNumber reads an optional number field within [lo, hi].
func optNumber(fields map[string]json.RawMessage, name string, lo, hi float64) (float64, bool, *apiError) {
	raw, ok := fields[name]
	if !ok || isNull(raw) {
		return 0, false, nil
	}
	f, err := strconv.ParseFloat(string(bytes.TrimSpace(raw)), 64)
	if err != nil || math.IsNaN(f) || math.IsInf(f, 0) {
		return 0, false, badRequest(name, "%s must be a number", name)
	}
	if f < lo || f > hi {
		return 0, false, badRequest(name, "%s must be between %g and %g, got %s", name, lo, hi, bytes.TrimSpace(raw))
	}
	return f, true, nil
}
