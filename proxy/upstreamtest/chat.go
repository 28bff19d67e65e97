package upstreamtest

import (
	"errors"
	"fmt"
	"net/http"
	"strings"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// chatChunk is a streamed chunk that says "usage": null (see
// completionChunk).
type chatChunk struct {
	wire.ChatResponse
	Usage *wire.Usage `json:"usage"`
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
func renderChat(msgs []wire.ChatMessage) (string, *apiError) {
	if msgs == nil {
		return "", invalid("messages", "Missing required parameter: 'messages'.")
	}
	if len(msgs) == 0 {
		return "", invalid("messages", "'messages' must not be empty.")
	}
	var b strings.Builder
	for i, msg := range msgs {
		if !chatRole(msg.Role) {
			return "", invalid(fmt.Sprintf("messages[%d].role", i), "Invalid value for 'messages[%d].role': %q.", i, msg.Role)
		}
		text, err := messageText(msg, i)
		if err != nil {
			return "", err
		}
		b.WriteString(msg.Role + ": " + text + "\n")
	}
	b.WriteString("assistant:")
	return b.String(), nil
}

// messageText returns message i's content: a string, null, or an array of
// {"type":"text","text":...} parts.
func messageText(m wire.ChatMessage, i int) (string, *apiError) {
	s, err := m.Text()
	var ce *wire.ContentError
	switch {
	case errors.As(err, &ce) && ce.Part < 0:
		return "", invalid(fmt.Sprintf("messages[%d].content", i), "Invalid type for 'messages[%d].content': expected a string or an array of content parts.", i)
	case errors.As(err, &ce):
		return "", invalid(fmt.Sprintf("messages[%d].content[%d].type", i, ce.Part), "Content parts of type %q are not supported.", ce.Type)
	}
	return s, nil
}

func (s *Server) chat(out responder, body []byte) {
	var req wire.ChatRequest
	st, m, err := s.decode(body, &req, func() *common {
		return commonOf(req.Model, req.Temperature, req.TopP, req.N, req.Seed, req.Stop, req.Stream, req.StreamOptions)
	})
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
	if req.Logprobs {
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
	u := wire.NewUsage(len(toks), genTokens)
	if !st.stream {
		resp := wire.ChatResponse{ID: id, Object: "chat.completion", Created: created, Model: st.model, SystemFingerprint: fp, Usage: &u}
		for j := range st.n {
			resp.Choices = append(resp.Choices, wire.ChatChoice{
				Index:        j,
				Message:      &wire.ChatAnswer{Role: "assistant", Content: joinTokens(gens[j])},
				Logprobs:     chatLogprobsOf(gens[j], k),
				FinishReason: &finishes[j],
			})
		}
		out.json(http.StatusOK, resp)
		return
	}

	es := out.stream()
	chunk := func(c wire.ChatChoice) {
		r := wire.ChatResponse{ID: id, Object: "chat.completion.chunk", Created: created, Model: st.model, SystemFingerprint: fp, Choices: []wire.ChatChoice{c}}
		if st.usage {
			es.send(chatChunk{ChatResponse: r})
			return
		}
		es.send(r)
	}
	for j := range st.n {
		empty := ""
		chunk(wire.ChatChoice{Index: j, Delta: &wire.ChatDelta{Role: "assistant", Content: &empty}})
	}
	for pos := 0; ; pos++ {
		more := false
		for j := range st.n {
			if pos >= len(gens[j]) {
				continue
			}
			more = true
			t := gens[j][pos : pos+1]
			chunk(wire.ChatChoice{Index: j, Delta: &wire.ChatDelta{Content: &t[0].text}, Logprobs: chatLogprobsOf(t, k)})
		}
		if !more {
			break
		}
	}
	for j := range st.n {
		chunk(wire.ChatChoice{Index: j, Delta: &wire.ChatDelta{}, FinishReason: &finishes[j]})
	}
	if st.usage {
		es.send(wire.ChatResponse{ID: id, Object: "chat.completion.chunk", Created: created, Model: st.model, SystemFingerprint: fp, Choices: []wire.ChatChoice{}, Usage: &u})
	}
	es.done()
}

// chatLogprobsOf returns the chat logprobs object for toks with k top
// entries each; nil when k < 0 (not requested).
func chatLogprobsOf(toks []token, k int) *wire.ChatLogprobs {
	if k < 0 {
		return nil
	}
	lp := &wire.ChatLogprobs{Content: make([]wire.ChatTokenLogprob, 0, len(toks))}
	for _, t := range toks {
		top := make([]wire.ChatTopLogprob, k)
		for i := range k {
			top[i] = wire.ChatTopLogprob{Token: t.cand.toks[i], Logprob: t.cand.lps[i], Bytes: wire.TokenBytes(t.cand.toks[i])}
		}
		lp.Content = append(lp.Content, wire.ChatTokenLogprob{Token: t.text, Logprob: t.logprob, Bytes: wire.TokenBytes(t.text), TopLogprobs: top})
	}
	return lp
}
