package upstreamtest

import (
	"encoding/json"
	"fmt"
	"net/http"
	"strings"
	"time"
)

// chatRequest is a POST /v1/chat/completions body.
type chatRequest struct {
	common
	Messages            json.RawMessage `json:"messages"`
	MaxTokens           *int            `json:"max_tokens"`
	MaxCompletionTokens *int            `json:"max_completion_tokens"`
	Logprobs            *bool           `json:"logprobs"`
	TopLogprobs         *int            `json:"top_logprobs"`
}

type chatMessage struct {
	Role    string          `json:"role"`
	Content json.RawMessage `json:"content"`
}

type chatResponse struct {
	ID                string       `json:"id"`
	Object            string       `json:"object"`
	Created           int64        `json:"created"`
	Model             string       `json:"model"`
	SystemFingerprint string       `json:"system_fingerprint"`
	Choices           []chatChoice `json:"choices"`
	Usage             any          `json:"usage,omitempty"`
}

type chatChoice struct {
	Index        int           `json:"index"`
	Message      *chatAnswer   `json:"message,omitempty"`
	Delta        *chatDelta    `json:"delta,omitempty"`
	Logprobs     *chatLogprobs `json:"logprobs"`
	FinishReason *string       `json:"finish_reason"`
}

type chatAnswer struct {
	Role    string  `json:"role"`
	Content string  `json:"content"`
	Refusal *string `json:"refusal"`
}

type chatDelta struct {
	Role    string  `json:"role,omitempty"`
	Content *string `json:"content,omitempty"`
}

type chatLogprobs struct {
	Content []chatTokenLogprob `json:"content"`
}

type chatTokenLogprob struct {
	Token       string           `json:"token"`
	Logprob     float64          `json:"logprob"`
	Bytes       []int            `json:"bytes"`
	TopLogprobs []chatTopLogprob `json:"top_logprobs"`
}

type chatTopLogprob struct {
	Token   string  `json:"token"`
	Logprob float64 `json:"logprob"`
	Bytes   []int   `json:"bytes"`
}

// defaultChatMaxTokens is the chat endpoint's default answer length.
const defaultChatMaxTokens = 64

// chatRoles are the roles a message may have.
func chatRole(r string) bool {
	switch r {
	case "system", "developer", "user", "assistant", "tool":
		return true
	}
	return false
}

// renderChat turns messages into the prompt text the toy model continues:
// one "role: content" line per message, then "assistant:".
func renderChat(raw json.RawMessage) (string, *apiError) {
	if len(raw) == 0 || string(raw) == "null" {
		return "", invalid("messages", "Missing required parameter: 'messages'.")
	}
	var msgs []chatMessage
	if err := json.Unmarshal(raw, &msgs); err != nil {
		return "", invalid("messages", "Invalid type for 'messages': expected an array of message objects.")
	}
	if len(msgs) == 0 {
		return "", invalid("messages", "'messages' must not be empty.")
	}
	var b strings.Builder
	for i, msg := range msgs {
		if !chatRole(msg.Role) {
			return "", invalid(fmt.Sprintf("messages[%d].role", i), "Invalid value for 'messages[%d].role': %q.", i, msg.Role)
		}
		text, err := messageText(msg.Content, i)
		if err != nil {
			return "", err
		}
		b.WriteString(msg.Role + ": " + text + "\n")
	}
	b.WriteString("assistant:")
	return b.String(), nil
}

// messageText returns a message's content: a string, null, or an array of
// {"type":"text","text":...} parts.
func messageText(raw json.RawMessage, i int) (string, *apiError) {
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
		return "", invalid(fmt.Sprintf("messages[%d].content", i), "Invalid type for 'messages[%d].content': expected a string or an array of content parts.", i)
	}
	var b strings.Builder
	for j, p := range parts {
		if p.Type != "text" {
			return "", invalid(fmt.Sprintf("messages[%d].content[%d].type", i, j), "Content parts of type %q are not supported.", p.Type)
		}
		b.WriteString(p.Text)
	}
	return b.String(), nil
}

func (s *Server) chat(out responder, body []byte) {
	var req chatRequest
	if err := decodeBody(body, &req); err != nil {
		out.error(err)
		return
	}
	st, err := req.validate()
	if err != nil {
		out.error(err)
		return
	}
	m, err := s.modelFor(st.model)
	if err != nil {
		out.error(err)
		return
	}
	maxTokens, param := defaultChatMaxTokens, ""
	switch {
	case req.MaxCompletionTokens != nil:
		maxTokens, param = *req.MaxCompletionTokens, "max_completion_tokens"
	case req.MaxTokens != nil:
		maxTokens, param = *req.MaxTokens, "max_tokens"
	}
	if maxTokens < 1 {
		out.error(invalid(param, "%d is less than the minimum of 1 - '%s'", maxTokens, param).withCode("invalid_value"))
		return
	}
	k := -1
	if req.Logprobs != nil && *req.Logprobs {
		k = 0
	}
	if req.TopLogprobs != nil {
		if k < 0 {
			out.error(invalid("top_logprobs", "'logprobs' must be set to true when 'top_logprobs' is used."))
			return
		}
		k = *req.TopLogprobs
		if k < 0 || k > maxTop {
			out.error(invalid("top_logprobs", "%d is not valid for 'top_logprobs': expected a value between 0 and %d.", k, maxTop).withCode("invalid_value"))
			return
		}
	}
	text, err := renderChat(req.Messages)
	if err != nil {
		out.error(err)
		return
	}
	toks := m.tokenize(text)
	if len(toks)+maxTokens > contextTokens {
		out.error(invalid("messages", "This model's maximum context length is %d tokens, but the messages have %d tokens and the answer may have %d.", contextTokens, len(toks), maxTokens).withCode("context_length_exceeded"))
		return
	}

	p := m.promptOf(toks)
	call := s.sampleCall()
	gens := make([][]token, st.n)
	finishes := make([]string, st.n)
	genTokens := 0
	for j := range st.n {
		gens[j], finishes[j] = m.generate(p, maxTokens, s.samplingFor(st, call, p.state, j), st.stops)
		genTokens += len(gens[j])
	}
	s.countPrompts(1, len(toks), genTokens)

	id, created := s.newID("chatcmpl-"), time.Now().Unix()
	fp := fmt.Sprintf("fp_%08x", uint32(hashString(st.model)))
	u := newUsage(len(toks), genTokens)
	if !st.stream {
		resp := chatResponse{ID: id, Object: "chat.completion", Created: created, Model: st.model, SystemFingerprint: fp, Usage: u}
		for j := range st.n {
			resp.Choices = append(resp.Choices, chatChoice{
				Index:        j,
				Message:      &chatAnswer{Role: "assistant", Content: joinTokens(gens[j])},
				Logprobs:     chatLogprobsOf(gens[j], k),
				FinishReason: &finishes[j],
			})
		}
		out.json(http.StatusOK, resp)
		return
	}

	es := out.stream()
	var chunkUsage any
	if st.usage {
		chunkUsage = json.RawMessage("null")
	}
	chunk := func(c chatChoice) {
		es.send(chatResponse{ID: id, Object: "chat.completion.chunk", Created: created, Model: st.model, SystemFingerprint: fp, Choices: []chatChoice{c}, Usage: chunkUsage})
	}
	for j := range st.n {
		empty := ""
		chunk(chatChoice{Index: j, Delta: &chatDelta{Role: "assistant", Content: &empty}})
	}
	for pos := 0; ; pos++ {
		more := false
		for j := range st.n {
			if pos >= len(gens[j]) {
				continue
			}
			more = true
			t := gens[j][pos : pos+1]
			chunk(chatChoice{Index: j, Delta: &chatDelta{Content: &t[0].text}, Logprobs: chatLogprobsOf(t, k)})
		}
		if !more {
			break
		}
	}
	for j := range st.n {
		chunk(chatChoice{Index: j, Delta: &chatDelta{}, FinishReason: &finishes[j]})
	}
	if st.usage {
		es.send(chatResponse{ID: id, Object: "chat.completion.chunk", Created: created, Model: st.model, SystemFingerprint: fp, Choices: []chatChoice{}, Usage: u})
	}
	es.done()
}

// chatLogprobsOf returns the chat logprobs object for toks with k top
// entries each; nil when k < 0 (not requested).
func chatLogprobsOf(toks []token, k int) *chatLogprobs {
	if k < 0 {
		return nil
	}
	lp := &chatLogprobs{Content: make([]chatTokenLogprob, 0, len(toks))}
	for _, t := range toks {
		top := make([]chatTopLogprob, k)
		for i := range k {
			top[i] = chatTopLogprob{Token: t.cand.toks[i], Logprob: t.cand.lps[i], Bytes: tokenBytes(t.cand.toks[i])}
		}
		lp.Content = append(lp.Content, chatTokenLogprob{Token: t.text, Logprob: t.logprob, Bytes: tokenBytes(t.text), TopLogprobs: top})
	}
	return lp
}
