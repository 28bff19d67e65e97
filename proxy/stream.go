package proxy

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"sort"
	"unicode/utf8"

	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/wire"
)

// assembler rebuilds a whole answer from a stream's chunks, so a streamed
// miss is stored like a plain one and streamed and plain requests share
// cache entries.
type assembler struct {
	ep       endpoint
	envelope map[string]json.RawMessage // top-level fields of the first chunk
	choices  map[int]*assembledChoice
	usage    json.RawMessage
	// unstorable is set when a chunk holds something the assembler cannot
	// rebuild exactly (tool calls); the answer is then relayed but not stored.
	unstorable bool
}

type assembledChoice struct {
	text         []byte
	role         string
	refusal      []byte
	hasRefusal   bool
	finish       json.RawMessage
	lpTokens     []json.RawMessage // completions: tokens
	lpTokenLP    []json.RawMessage
	lpTop        []json.RawMessage
	lpOffset     []json.RawMessage
	hasLogprobs  bool
	chatLogprobs []json.RawMessage // chat: logprobs.content entries
}

func newAssembler(ep endpoint) *assembler {
	return &assembler{ep: ep, choices: map[int]*assembledChoice{}}
}

// add takes one chunk; usageOnly reports a chunk with no choices that carries
// usage (the include_usage chunk).
func (a *assembler) add(data []byte) (usageOnly bool, err error) {
	var chunk map[string]json.RawMessage
	if err := json.Unmarshal(data, &chunk); err != nil {
		return false, fmt.Errorf("upstream stream chunk is not a JSON object: %w", err)
	}
	if a.envelope == nil {
		a.envelope = chunk
	}
	if raw, ok := chunk["usage"]; ok && !isNull(raw) {
		a.usage = raw
	}
	var choices []map[string]json.RawMessage
	if raw, ok := chunk["choices"]; ok && !isNull(raw) {
		if err := json.Unmarshal(raw, &choices); err != nil {
			return false, fmt.Errorf("upstream stream chunk choices: %w", err)
		}
	}
	if len(choices) == 0 {
		return a.usage != nil, nil
	}
	for _, ch := range choices {
		var idx int
		if err := json.Unmarshal(ch["index"], &idx); err != nil {
			return false, fmt.Errorf("upstream stream chunk has a bad choice index: %w", err)
		}
		c := a.choices[idx]
		if c == nil {
			c = &assembledChoice{}
			a.choices[idx] = c
		}
		if raw, ok := ch["finish_reason"]; ok && !isNull(raw) {
			c.finish = raw
		}
		if a.ep == endpointChat {
			if err := a.addChat(c, ch); err != nil {
				return false, err
			}
		} else if err := a.addCompletion(c, ch); err != nil {
			return false, err
		}
	}
	return false, nil
}

func (a *assembler) addCompletion(c *assembledChoice, ch map[string]json.RawMessage) error {
	var part struct {
		Text     string `json:"text"`
		Logprobs *struct {
			Tokens        []json.RawMessage `json:"tokens"`
			TokenLogprobs []json.RawMessage `json:"token_logprobs"`
			TopLogprobs   []json.RawMessage `json:"top_logprobs"`
			TextOffset    []json.RawMessage `json:"text_offset"`
		} `json:"logprobs"`
	}
	if err := json.Unmarshal(mustMarshal(ch), &part); err != nil {
		return fmt.Errorf("upstream stream chunk: %w", err)
	}
	c.text = append(c.text, part.Text...)
	if lp := part.Logprobs; lp != nil {
		c.hasLogprobs = true
		c.lpTokens = append(c.lpTokens, lp.Tokens...)
		c.lpTokenLP = append(c.lpTokenLP, lp.TokenLogprobs...)
		c.lpTop = append(c.lpTop, lp.TopLogprobs...)
		c.lpOffset = append(c.lpOffset, lp.TextOffset...)
	}
	return nil
}

func (a *assembler) addChat(c *assembledChoice, ch map[string]json.RawMessage) error {
	var part struct {
		Delta    map[string]json.RawMessage `json:"delta"`
		Logprobs *struct {
			Content []json.RawMessage `json:"content"`
		} `json:"logprobs"`
	}
	if err := json.Unmarshal(mustMarshal(ch), &part); err != nil {
		return fmt.Errorf("upstream stream chunk: %w", err)
	}
	for k, v := range part.Delta {
		if isNull(v) {
			continue
		}
		var s string
		switch k {
		case "role":
			if err := json.Unmarshal(v, &s); err != nil {
				return fmt.Errorf("upstream stream delta role: %w", err)
			}
			c.role = s
		case "content":
			if err := json.Unmarshal(v, &s); err != nil {
				return fmt.Errorf("upstream stream delta content: %w", err)
			}
			c.text = append(c.text, s...)
		case "refusal":
			if err := json.Unmarshal(v, &s); err != nil {
				return fmt.Errorf("upstream stream delta refusal: %w", err)
			}
			c.refusal = append(c.refusal, s...)
			c.hasRefusal = true
		default:
			a.unstorable = true
		}
	}
	if part.Logprobs != nil {
		c.hasLogprobs = true
		c.chatLogprobs = append(c.chatLogprobs, part.Logprobs.Content...)
	}
	return nil
}

// reportedUsage is the usage the stream's usage chunk reported.
func (a *assembler) reportedUsage() (wire.Usage, bool) {
	var u wire.Usage
	if a.usage == nil || json.Unmarshal(a.usage, &u) != nil {
		return wire.Usage{}, false
	}
	return u, true
}

// errUnstorable marks an assembled stream that cannot be stored.
var errUnstorable = errors.New("streamed answer holds parts the proxy does not store")

// result returns the assembled answer in the endpoint's non-streaming shape.
func (a *assembler) result() ([]byte, error) {
	if a.envelope == nil {
		return nil, &upstreamError{err: errors.New("upstream stream had no chunks")}
	}
	if a.unstorable {
		return nil, errUnstorable
	}
	if a.usage == nil {
		return nil, &upstreamError{err: errors.New("upstream stream ended without a usage chunk")}
	}
	env := make(map[string]json.RawMessage, len(a.envelope))
	for k, v := range a.envelope {
		env[k] = v
	}
	idx := make([]int, 0, len(a.choices))
	for i := range a.choices {
		idx = append(idx, i)
	}
	sort.Ints(idx)
	choices := make([]map[string]any, 0, len(idx))
	for _, i := range idx {
		c := a.choices[i]
		finish := c.finish
		if finish == nil {
			finish = json.RawMessage("null")
		}
		out := map[string]any{"index": i, "finish_reason": finish}
		if a.ep == endpointChat {
			role := c.role
			if role == "" {
				role = "assistant"
			}
			msg := map[string]any{"role": role, "content": string(c.text)}
			if c.hasRefusal {
				msg["refusal"] = string(c.refusal)
			}
			out["message"] = msg
			if c.hasLogprobs {
				content := c.chatLogprobs
				if content == nil {
					content = []json.RawMessage{}
				}
				out["logprobs"] = map[string]any{"content": content}
			} else {
				out["logprobs"] = nil
			}
		} else {
			out["text"] = string(c.text)
			if c.hasLogprobs {
				out["logprobs"] = map[string]any{
					"tokens": orEmpty(c.lpTokens), "token_logprobs": orEmpty(c.lpTokenLP),
					"top_logprobs": orEmpty(c.lpTop), "text_offset": orEmpty(c.lpOffset),
				}
			} else {
				out["logprobs"] = nil
			}
		}
		choices = append(choices, out)
	}
	env["choices"] = mustMarshal(choices)
	env["usage"] = a.usage
	if a.ep == endpointChat {
		env["object"] = json.RawMessage(`"chat.completion"`)
	} else {
		env["object"] = json.RawMessage(`"text_completion"`)
	}
	return json.Marshal(env)
}

func orEmpty(v []json.RawMessage) []json.RawMessage {
	if v == nil {
		return []json.RawMessage{}
	}
	return v
}

// writeStream synthesizes a valid event stream from a whole answer: per
// choice, one chunk per token when token data allow it (else one chunk with
// the whole text), then a finishing chunk; a usage chunk when the client
// asked for one; then [DONE].
func writeStream(w http.ResponseWriter, ep endpoint, body []byte, includeUsage bool, cacheStatus string) error {
	var env map[string]json.RawMessage
	if err := json.Unmarshal(body, &env); err != nil {
		return fmt.Errorf("stored answer: %w", err)
	}
	var choices []map[string]json.RawMessage
	if err := json.Unmarshal(env["choices"], &choices); err != nil {
		return fmt.Errorf("stored answer choices: %w", err)
	}
	base := make(map[string]json.RawMessage, len(env))
	for k, v := range env {
		if k != "choices" && k != "usage" {
			base[k] = v
		}
	}
	if ep == endpointChat {
		base["object"] = json.RawMessage(`"chat.completion.chunk"`)
	} else {
		base["object"] = json.RawMessage(`"text_completion"`)
	}
	h := w.Header()
	h.Set("Content-Type", "text/event-stream")
	h.Set("Cache-Control", "no-cache")
	h.Set(HeaderCacheStatus, cacheStatus)
	w.WriteHeader(http.StatusOK)
	sw := sse.NewWriter(w)
	emit := func(chs []any, usage json.RawMessage) error {
		chunk := make(map[string]json.RawMessage, len(base)+2)
		for k, v := range base {
			chunk[k] = v
		}
		chunk["choices"] = mustMarshal(chs)
		if usage != nil {
			chunk["usage"] = usage
		}
		return sw.WriteData(mustMarshal(chunk))
	}
	for _, ch := range choices {
		var parts []any
		if ep == endpointChat {
			parts = chatChunks(ch)
		} else {
			parts = completionChunks(ch)
		}
		for _, part := range parts {
			if err := emit([]any{part}, nil); err != nil {
				return err
			}
		}
	}
	if includeUsage {
		u := env["usage"]
		if u == nil {
			u = json.RawMessage("null")
		}
		if err := emit([]any{}, u); err != nil {
			return err
		}
	}
	return sw.WriteDone()
}

// piecesValid reports whether every token is valid UTF-8 on its own, so a
// chunk per token carries the same text.
func piecesValid(content []chatTokenLogprob) bool {
	for i := range content {
		if !utf8.ValidString(chatText(content[i : i+1])) {
			return false
		}
	}
	return true
}

func completionChunks(ch map[string]json.RawMessage) []any {
	index, finish := ch["index"], ch["finish_reason"]
	var text string
	_ = json.Unmarshal(ch["text"], &text)
	var lp *completionLogprobs
	if raw, ok := ch["logprobs"]; ok && !isNull(raw) {
		lp = &completionLogprobs{}
		if err := json.Unmarshal(raw, lp); err != nil {
			lp = nil
		}
	}
	var out []any
	if lp != nil && len(lp.Tokens) > 0 && joinTokens(lp.Tokens) == text && len(lp.TokenLogprobs) == len(lp.Tokens) {
		for i, tok := range lp.Tokens {
			part := completionLogprobs{Tokens: lp.Tokens[i : i+1], TokenLogprobs: lp.TokenLogprobs[i : i+1]}
			if i < len(lp.TopLogprobs) {
				part.TopLogprobs = lp.TopLogprobs[i : i+1]
			}
			if i < len(lp.TextOffset) {
				part.TextOffset = lp.TextOffset[i : i+1]
			}
			out = append(out, map[string]any{"index": index, "text": tok, "logprobs": part, "finish_reason": nil})
		}
	} else {
		out = append(out, map[string]any{"index": index, "text": text, "logprobs": ch["logprobs"], "finish_reason": nil})
	}
	out = append(out, map[string]any{"index": index, "text": "", "logprobs": nil, "finish_reason": finish})
	return out
}

func chatChunks(ch map[string]json.RawMessage) []any {
	index, finish := ch["index"], ch["finish_reason"]
	var msg map[string]json.RawMessage
	_ = json.Unmarshal(ch["message"], &msg)
	var content string
	_ = json.Unmarshal(msg["content"], &content)
	first := map[string]json.RawMessage{"role": msg["role"], "content": json.RawMessage(`""`)}
	for k, v := range msg {
		if k != "role" && k != "content" {
			first[k] = v
		}
	}
	if first["role"] == nil {
		first["role"] = json.RawMessage(`"assistant"`)
	}
	out := []any{map[string]any{"index": index, "delta": first, "logprobs": nil, "finish_reason": nil}}
	var lp struct {
		Content []chatTokenLogprob `json:"content"`
	}
	hasLP := false
	if raw, ok := ch["logprobs"]; ok && !isNull(raw) {
		hasLP = json.Unmarshal(raw, &lp) == nil
	}
	if hasLP && len(lp.Content) > 0 && chatText(lp.Content) == content && piecesValid(lp.Content) {
		var whole struct {
			Content []json.RawMessage `json:"content"`
		}
		_ = json.Unmarshal(ch["logprobs"], &whole)
		for i := range lp.Content {
			out = append(out, map[string]any{
				"index": index, "delta": map[string]any{"content": chatText(lp.Content[i : i+1])},
				"logprobs": map[string]any{"content": whole.Content[i : i+1]}, "finish_reason": nil,
			})
		}
	} else if content != "" {
		out = append(out, map[string]any{"index": index, "delta": map[string]any{"content": content}, "logprobs": ch["logprobs"], "finish_reason": nil})
	}
	out = append(out, map[string]any{"index": index, "delta": map[string]any{}, "logprobs": nil, "finish_reason": finish})
	return out
}
