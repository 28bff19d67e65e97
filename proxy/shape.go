package proxy

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"unicode/utf8"

	"github.com/stintlab/stint/proxy/wire"
)

// errNotExact means a stored answer cannot be cut down to the request
// exactly; the caller treats it as a miss.
var errNotExact = errors.New("stored answer cannot be shaped exactly")

// shape derives the answer to a request for (wantLP, wantMax) from a stored
// variant that covers it. An exact variant is returned as stored.
func shape(ep endpoint, v variant, wantLP, wantMax int) ([]byte, wire.Usage, error) {
	if v.Logprobs == wantLP && v.MaxTokens == wantMax {
		return v.Body, v.Usage, nil
	}
	cut := noLevel
	if v.MaxTokens != wantMax && wantMax < v.Tokens {
		cut = wantMax
	}
	var env map[string]json.RawMessage
	if err := json.Unmarshal(v.Body, &env); err != nil {
		return nil, wire.Usage{}, fmt.Errorf("decode stored answer: %w", err)
	}
	var choices []map[string]json.RawMessage
	if err := json.Unmarshal(env["choices"], &choices); err != nil {
		return nil, wire.Usage{}, fmt.Errorf("decode stored choices: %w", err)
	}
	u := v.Usage
	for _, ch := range choices {
		var err error
		if ep == endpointChat {
			err = shapeChatChoice(ch, wantLP, cut)
		} else {
			err = shapeCompletionChoice(ch, wantLP, cut)
		}
		if err != nil {
			return nil, wire.Usage{}, err
		}
	}
	if cut != noLevel {
		u.CompletionTokens = cut * len(choices)
		u.TotalTokens = u.PromptTokens + u.CompletionTokens
		ub, _ := json.Marshal(u)
		env["usage"] = ub
	}
	cb, err := json.Marshal(choices)
	if err != nil {
		return nil, wire.Usage{}, err
	}
	env["choices"] = cb
	out, err := json.Marshal(env)
	if err != nil {
		return nil, wire.Usage{}, err
	}
	return out, u, nil
}

// completionLogprobs is the completions endpoint's logprobs object. Top
// log-probabilities are kept raw to preserve their key order.
type completionLogprobs struct {
	Tokens        []string          `json:"tokens"`
	TokenLogprobs []*float64        `json:"token_logprobs"`
	TopLogprobs   []json.RawMessage `json:"top_logprobs"`
	TextOffset    []int             `json:"text_offset"`
}

func shapeCompletionChoice(ch map[string]json.RawMessage, wantLP, cut int) error {
	raw, ok := ch["logprobs"]
	if !ok || isNull(raw) {
		if cut != noLevel {
			return errNotExact
		}
		return nil
	}
	var lp completionLogprobs
	if err := json.Unmarshal(raw, &lp); err != nil {
		return fmt.Errorf("%w: logprobs: %v", errNotExact, err)
	}
	if cut != noLevel {
		var text string
		if err := json.Unmarshal(ch["text"], &text); err != nil {
			return fmt.Errorf("%w: text: %v", errNotExact, err)
		}
		if cut > len(lp.Tokens) || len(lp.TokenLogprobs) != len(lp.Tokens) || joinTokens(lp.Tokens) != text {
			return errNotExact
		}
		lp.Tokens = lp.Tokens[:cut]
		lp.TokenLogprobs = lp.TokenLogprobs[:cut]
		if len(lp.TopLogprobs) >= cut {
			lp.TopLogprobs = lp.TopLogprobs[:cut]
		}
		if len(lp.TextOffset) >= cut {
			lp.TextOffset = lp.TextOffset[:cut]
		}
		tb, _ := json.Marshal(joinTokens(lp.Tokens))
		ch["text"] = tb
		ch["finish_reason"] = json.RawMessage(`"length"`)
	}
	if wantLP == noLevel {
		ch["logprobs"] = json.RawMessage("null")
		return nil
	}
	for i, top := range lp.TopLogprobs {
		if isNull(top) {
			continue
		}
		cutTop, err := truncateTopObject(top, wantLP)
		if err != nil {
			return err
		}
		lp.TopLogprobs[i] = cutTop
	}
	b, err := json.Marshal(lp)
	if err != nil {
		return err
	}
	ch["logprobs"] = b
	return nil
}

func joinTokens(tokens []string) string {
	var b bytes.Buffer
	for _, t := range tokens {
		b.WriteString(t)
	}
	return b.String()
}

// truncateTopObject keeps the k most likely entries of a {token: logprob}
// object, most likely first (ties keep their stored order).
func truncateTopObject(raw json.RawMessage, k int) (json.RawMessage, error) {
	type entry struct {
		key json.RawMessage
		lp  float64
		val json.RawMessage
	}
	dec := json.NewDecoder(bytes.NewReader(raw))
	if t, err := dec.Token(); err != nil || t != json.Delim('{') {
		return nil, fmt.Errorf("%w: top_logprobs entry is not an object", errNotExact)
	}
	var entries []entry
	for dec.More() {
		t, err := dec.Token()
		if err != nil {
			return nil, fmt.Errorf("%w: %v", errNotExact, err)
		}
		key, _ := json.Marshal(t.(string))
		var val json.RawMessage
		if err := dec.Decode(&val); err != nil {
			return nil, fmt.Errorf("%w: %v", errNotExact, err)
		}
		var lp float64
		if err := json.Unmarshal(val, &lp); err != nil {
			return nil, fmt.Errorf("%w: %v", errNotExact, err)
		}
		entries = append(entries, entry{key, lp, val})
	}
	sort.SliceStable(entries, func(i, j int) bool { return entries[i].lp > entries[j].lp })
	if len(entries) > k {
		entries = entries[:k]
	}
	var b bytes.Buffer
	b.WriteByte('{')
	for i, e := range entries {
		if i > 0 {
			b.WriteByte(',')
		}
		b.Write(e.key)
		b.WriteByte(':')
		b.Write(e.val)
	}
	b.WriteByte('}')
	return b.Bytes(), nil
}

// chatTokenLogprob is one entry of a chat choice's logprobs.content.
type chatTokenLogprob struct {
	Token       string            `json:"token"`
	Logprob     float64           `json:"logprob"`
	Bytes       []int             `json:"bytes"`
	TopLogprobs []json.RawMessage `json:"top_logprobs"`
}

func shapeChatChoice(ch map[string]json.RawMessage, wantLP, cut int) error {
	raw, ok := ch["logprobs"]
	if !ok || isNull(raw) {
		if cut != noLevel {
			return errNotExact
		}
		return nil
	}
	var lp map[string]json.RawMessage
	if err := json.Unmarshal(raw, &lp); err != nil {
		return fmt.Errorf("%w: logprobs: %v", errNotExact, err)
	}
	var content []chatTokenLogprob
	if c, ok := lp["content"]; ok && !isNull(c) {
		if err := json.Unmarshal(c, &content); err != nil {
			return fmt.Errorf("%w: logprobs.content: %v", errNotExact, err)
		}
	}
	if cut != noLevel {
		var msg map[string]json.RawMessage
		if err := json.Unmarshal(ch["message"], &msg); err != nil {
			return fmt.Errorf("%w: message: %v", errNotExact, err)
		}
		var text string
		if err := json.Unmarshal(msg["content"], &text); err != nil {
			return fmt.Errorf("%w: message.content: %v", errNotExact, err)
		}
		if cut > len(content) || chatText(content) != text {
			return errNotExact
		}
		content = content[:cut]
		prefix := chatText(content)
		if !utf8.ValidString(prefix) {
			return errNotExact
		}
		tb, _ := json.Marshal(prefix)
		msg["content"] = tb
		mb, _ := json.Marshal(msg)
		ch["message"] = mb
		ch["finish_reason"] = json.RawMessage(`"length"`)
	}
	if wantLP == noLevel {
		ch["logprobs"] = json.RawMessage("null")
		return nil
	}
	for i := range content {
		tops := content[i].TopLogprobs
		sort.SliceStable(tops, func(a, b int) bool { return topLogprob(tops[a]) > topLogprob(tops[b]) })
		if len(tops) > wantLP {
			content[i].TopLogprobs = tops[:wantLP]
		}
		if content[i].TopLogprobs == nil {
			content[i].TopLogprobs = []json.RawMessage{}
		}
	}
	cb, err := json.Marshal(content)
	if err != nil {
		return err
	}
	lp["content"] = cb
	b, err := json.Marshal(lp)
	if err != nil {
		return err
	}
	ch["logprobs"] = b
	return nil
}

// chatText rebuilds the message text from its tokens, by their bytes when
// given (a token may hold part of a UTF-8 sequence).
func chatText(content []chatTokenLogprob) string {
	var b bytes.Buffer
	for _, c := range content {
		if c.Bytes != nil {
			for _, x := range c.Bytes {
				b.WriteByte(byte(x))
			}
			continue
		}
		b.WriteString(c.Token)
	}
	return b.String()
}

func topLogprob(raw json.RawMessage) float64 {
	var t struct {
		Logprob float64 `json:"logprob"`
	}
	_ = json.Unmarshal(raw, &t)
	return t.Logprob
}
