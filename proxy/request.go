package proxy

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net/http"
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
	// logprobsAsked is the depth the request sent in logprobsField
	// (completions logprobs, chat top_logprobs; "" when neither), possibly
	// out of range: checkLogprobs holds it to the routed upstream's range.
	logprobsAsked int
	logprobsField string

	// prompts holds the completions prompt split into items: one entry for a
	// string or a token array, one per element for an array of those.
	prompts      []json.RawMessage
	promptsArray bool
}

// parseRequest decodes and validates body for ep. A completions prompt
// may have at most maxPrompts items (no cap when maxPrompts < 1).
func parseRequest(ep endpoint, body []byte, maxPrompts int) (*request, *apiError) {
	var fields map[string]json.RawMessage
	dec := json.NewDecoder(bytes.NewReader(body))
	if err := dec.Decode(&fields); err != nil {
		return nil, invalidJSON("request body %s", describeJSONError(err, "a JSON object"))
	}
	if dec.More() {
		return nil, invalidJSON("request body has data after the JSON object")
	}
	if fields == nil {
		return nil, invalidJSON("request body must be a JSON object, not null")
	}
	if err := checkCanonical(body); err != nil {
		return nil, invalidJSON("request body is not I-JSON (RFC 8785 §3.1): %v", err)
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
			return nil, badRequest("stream_options", "stream_options must be an object, not %s", jsonKind(raw))
		}
		r.includeUsage = so.IncludeUsage != nil && *so.IncludeUsage
	}
	if n, ok, e := optInt(fields, "n", 1, maxN); e != nil {
		return nil, e
	} else if ok {
		r.n = n
	}
	if t, ok, e := optNumber(fields, "temperature", 0, math.Inf(1)); e != nil {
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
	if lp, ok, e := optInt(r.fields, "logprobs", -maxLogprobs, maxLogprobs); e != nil {
		return e
	} else if ok {
		r.logprobsAsked, r.logprobsField = lp, "logprobs"
		if lp >= 0 {
			r.logprobs = lp
		}
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
		return badRequest("messages", "messages must be an array, not %s", jsonKind(raw))
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
	top, hasTop, e := optInt(r.fields, "top_logprobs", -maxLogprobs, maxLogprobs)
	if e != nil {
		return e
	}
	if hasTop && !want {
		return badRequest("top_logprobs", "top_logprobs requires logprobs to be true")
	}
	if hasTop {
		r.logprobsAsked, r.logprobsField = top, "top_logprobs"
	}
	if want {
		r.logprobs = max(top, 0)
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
			return nil, false, badRequest("prompt", "prompt is not a valid JSON string")
		}
		return []json.RawMessage{raw}, false, nil
	case '[':
	default:
		return nil, false, badRequest("prompt", "prompt must be a string, an array of strings, an array of token ids or an array of token-id arrays")
	}
	var items []json.RawMessage
	if err := json.Unmarshal(raw, &items); err != nil {
		return nil, false, badRequest("prompt", "prompt is not a valid JSON array")
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
				return nil, false, badRequest("prompt", "prompt[%d] is not a valid JSON string", i)
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
		return errors.New("token ids must be whole numbers of at most 64 bits")
	}
	for _, id := range ids {
		if id < 0 {
			return errors.New("token id " + strconv.FormatInt(id, 10) + " is negative")
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
		return "", badRequest(name, "%s must be a string, not %s", name, jsonKind(raw))
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
		return false, badRequest(name, "%s must be true or false, not %s", name, jsonKind(raw))
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
		return 0, false, badRequest(name, "%s must be a whole number, not %s", name, bytes.TrimSpace(raw))
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
		return 0, false, badRequest(name, "%s must be a number, not %s", name, bytes.TrimSpace(raw))
	}
	if math.IsInf(hi, 1) && f < lo {
		return 0, false, badRequest(name, "%s must be at least %g, got %s", name, lo, bytes.TrimSpace(raw))
	}
	if f < lo || f > hi {
		return 0, false, badRequest(name, "%s must be between %g and %g, got %s", name, lo, hi, bytes.TrimSpace(raw))
	}
	return f, true, nil
}

// checkLogprobs refuses a log-probability depth outside [0, limit], the
// routed upstream's range, before anything is sent.
func (r *request) checkLogprobs(limit int, upstream string) *apiError {
	if r.logprobsField == "" || (r.logprobsAsked >= 0 && r.logprobsAsked <= limit) {
		return nil
	}
	return badRequest(r.logprobsField, "%s must be between 0 and %d for upstream %q (its max_logprobs), got %d", r.logprobsField, limit, upstream, r.logprobsAsked)
}

// invalidJSON is the error of a body that is not the JSON object asked for.
func invalidJSON(format string, args ...any) *apiError {
	e := badRequest("", format, args...)
	e.code = "invalid_json"
	return e
}

// describeJSONError says, in the wire format's words, why a JSON value
// could not be read as want ("a JSON object"): it is not JSON at all, it
// ends early, or it is another kind of value. It never shows Go's types.
func describeJSONError(err error, want string) string {
	var se *json.SyntaxError
	var te *json.UnmarshalTypeError
	switch {
	case errors.As(err, &se):
		return sprintf("is not valid JSON: %s (at byte %d)", se.Error(), se.Offset)
	case errors.As(err, &te):
		return sprintf("must be %s, not %s", want, article(te.Value))
	case errors.Is(err, io.ErrUnexpectedEOF), errors.Is(err, io.EOF):
		return "is not valid JSON: it ends before the value does"
	}
	return "is not valid JSON"
}

// jsonKind names the kind of a JSON value as the wire format's docs do:
// "an array", "an object", "a string", "a number", "a boolean", "null".
func jsonKind(raw json.RawMessage) string {
	raw = bytes.TrimSpace(raw)
	if len(raw) == 0 {
		return "empty"
	}
	switch c := raw[0]; {
	case c == '[':
		return "an array"
	case c == '{':
		return "an object"
	case c == '"':
		return "a string"
	case c == 't' || c == 'f':
		return "a boolean"
	case c == 'n':
		return "null"
	}
	return "a number"
}

// article puts "a" or "an" before the kind names encoding/json reports
// ("array", "object", "string", "number", "bool").
func article(kind string) string {
	switch kind {
	case "array", "object":
		return "an " + kind
	case "bool":
		return "a boolean"
	case "":
		return "another kind of value"
	}
	return "a " + kind
}

// readBody reads the request body, refusing one larger than MaxBodyBytes
// (413) or one that does not arrive within the read timeout (408).
func (p *Proxy) readBody(w http.ResponseWriter, r *http.Request) ([]byte, *apiError) {
	body, err := readAllSized(http.MaxBytesReader(w, r.Body, p.maxBody), r.ContentLength, p.maxBody)
	if err != nil {
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			return nil, &apiError{status: http.StatusRequestEntityTooLarge, typ: errInvalidRequest, code: "body_too_large", message: fmt.Sprintf("request body is larger than %d bytes", p.maxBody)}
		}
		if bodyTimedOut(err) {
			w.Header().Set("Connection", "close")
			return nil, &apiError{status: http.StatusRequestTimeout, typ: errInvalidRequest, code: "body_timeout", message: "the request body did not arrive within the server's read timeout"}
		}
		return nil, badRequest("", "cannot read request body: %v", err)
	}
	return body, nil
}

// readAllSized reads r to its end like io.ReadAll, starting from a buffer
// of the announced length (when it is known and within limit) so a body
// is read into one allocation of its own size.
func readAllSized(r io.Reader, announced, limit int64) ([]byte, error) {
	if announced <= 0 || announced > limit {
		return io.ReadAll(r)
	}
	// One byte more than announced, so reaching the end needs no growth.
	b := make([]byte, 0, announced+1)
	for {
		n, err := r.Read(b[len(b):cap(b)])
		b = b[:len(b)+n]
		if err == io.EOF {
			return b, nil
		}
		if err != nil {
			return b, err
		}
		if len(b) == cap(b) {
			b = append(b, 0)[:len(b)] // grow: the body is longer than announced
		}
	}
}
