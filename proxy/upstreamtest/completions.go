package upstreamtest

import (
	"encoding/json"
	"net/http"
	"strings"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// completionChunk is a streamed chunk that says "usage": null, as the
// API writes every chunk but the last when stream_options.include_usage is
// set.
type completionChunk struct {
	wire.CompletionResponse
	Usage *wire.Usage `json:"usage"`
}

// defaultMaxTokens is the completions endpoint's max_tokens default.
const defaultMaxTokens = 16

// parsePrompts parses "prompt" into token lists.
func (m *model) parsePrompts(raw json.RawMessage) ([][]string, *apiError) {
	if len(raw) == 0 || string(raw) == "null" {
		return nil, invalid("prompt", "you must provide a prompt parameter")
	}
	var one string
	if json.Unmarshal(raw, &one) == nil {
		return [][]string{m.tokenize(one)}, nil
	}
	var elems []json.RawMessage
	if err := json.Unmarshal(raw, &elems); err != nil {
		return nil, invalid("prompt", "Invalid type for 'prompt': expected a string, an array of strings, an array of token ids or an array of arrays of token ids.")
	}
	if len(elems) == 0 {
		return nil, invalid("prompt", "'prompt' must not be an empty array.")
	}
	var strs []string
	if json.Unmarshal(raw, &strs) == nil {
		out := make([][]string, len(strs))
		for i, s := range strs {
			out[i] = m.tokenize(s)
		}
		return out, nil
	}
	var ids []int
	if json.Unmarshal(raw, &ids) == nil {
		toks, err := m.fromIDs(ids)
		if err != nil {
			return nil, err
		}
		return [][]string{toks}, nil
	}
	var lists [][]int
	if err := json.Unmarshal(raw, &lists); err != nil {
		return nil, invalid("prompt", "Invalid type for 'prompt': an array prompt must hold only strings, only token ids, or only arrays of token ids.")
	}
	out := make([][]string, len(lists))
	for i, l := range lists {
		if len(l) == 0 {
			return nil, invalid("prompt", "'prompt[%d]' must not be an empty array of token ids.", i)
		}
		toks, err := m.fromIDs(l)
		if err != nil {
			return nil, err
		}
		out[i] = toks
	}
	return out, nil
}

// fromIDs maps token ids to tokens.
func (m *model) fromIDs(ids []int) ([]string, *apiError) {
	out := make([]string, len(ids))
	for i, id := range ids {
		if id < 0 || id >= len(m.vocab) {
			return nil, invalid("prompt", "Invalid token id %d in prompt: ids run from 0 to %d.", id, len(m.vocab)-1)
		}
		out[i] = m.vocab[id]
	}
	return out, nil
}

// completionChoiceData is one choice before it is written out.
type completionChoiceData struct {
	index  int
	echo   []token
	gen    []token
	finish string
}

func (s *Server) completions(out responder, body []byte) {
	var req wire.CompletionRequest
	st, m, err := s.decode(body, &req, func() *common {
		return commonOf(req.Model, req.Temperature, req.TopP, req.N, req.Seed, req.Stop, req.Stream, req.StreamOptions)
	})
	if err != nil {
		out.error(err)
		return
	}
	maxTokens := defaultMaxTokens
	if req.MaxTokens != nil {
		maxTokens = *req.MaxTokens
		if maxTokens < 0 {
			out.error(invalid("max_tokens", "%d is less than the minimum of 0 - 'max_tokens'", maxTokens).withCode("invalid_value"))
			return
		}
	}
	k := -1
	if req.Logprobs != nil {
		k = *req.Logprobs
		if k < 0 || k > maxTop {
			out.error(invalid("logprobs", "%d is not valid for 'logprobs': expected a value between 0 and %d.", k, maxTop).withCode("invalid_value"))
			return
		}
	}
	echo := req.Echo
	prompts, err := m.parsePrompts(req.Prompt)
	if err != nil {
		out.error(err)
		return
	}
	promptTokens := 0
	for i, p := range prompts {
		if len(p)+maxTokens > contextTokens {
			out.error(invalid("max_tokens", "This model's maximum context length is %d tokens, but prompt %d has %d tokens and max_tokens is %d.", contextTokens, i, len(p), maxTokens).withCode("context_length_exceeded"))
			return
		}
		promptTokens += len(p)
	}

	call := s.sampleCall()
	var choices []completionChoiceData
	genTokens := 0
	for pi, toks := range prompts {
		p := m.promptOf(toks)
		var echoed []token
		if echo {
			echoed = m.echo(p)
		}
		for j := range st.n {
			idx := pi*st.n + j
			gen, finish := m.generate(p, maxTokens, s.samplingFor(st, call, p.state, idx), st.stops)
			genTokens += len(gen)
			choices = append(choices, completionChoiceData{index: idx, echo: echoed, gen: gen, finish: finish})
		}
	}
	s.countPrompts(len(prompts), promptTokens, genTokens)

	id, created := s.newID("cmpl-"), time.Now().Unix()
	u := wire.NewUsage(promptTokens, genTokens)
	if !st.stream {
		resp := wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: st.model, Usage: &u}
		for _, c := range choices {
			all := append(append([]token(nil), c.echo...), c.gen...)
			resp.Choices = append(resp.Choices, wire.CompletionChoice{
				Text:         joinTokens(all),
				Index:        c.index,
				Logprobs:     completionLogprobsOf(all, k, 0),
				FinishReason: &c.finish,
			})
		}
		out.json(http.StatusOK, resp)
		return
	}

	// Streaming: the echoed prompt (if any) as each choice's first piece,
	// then one token per chunk, the choices interleaved, then each
	// choice's finish reason.
	es := out.stream()
	chunk := func(c wire.CompletionChoice) {
		r := wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: st.model, Choices: []wire.CompletionChoice{c}}
		if st.usage {
			es.send(completionChunk{CompletionResponse: r})
			return
		}
		es.send(r)
	}
	offsets := make([]int, len(choices))
	if echo {
		for i, c := range choices {
			chunk(wire.CompletionChoice{Text: joinTokens(c.echo), Index: c.index, Logprobs: completionLogprobsOf(c.echo, k, 0)})
			offsets[i] = len(joinTokens(c.echo))
		}
	}
	for pos := 0; ; pos++ {
		more := false
		for i, c := range choices {
			if pos >= len(c.gen) {
				continue
			}
			more = true
			t := c.gen[pos : pos+1]
			chunk(wire.CompletionChoice{Text: t[0].text, Index: c.index, Logprobs: completionLogprobsOf(t, k, offsets[i])})
			offsets[i] += len(t[0].text)
		}
		if !more {
			break
		}
	}
	for _, c := range choices {
		finish := c.finish
		chunk(wire.CompletionChoice{Text: "", Index: c.index, Logprobs: completionLogprobsOf(nil, k, 0), FinishReason: &finish})
	}
	if st.usage {
		es.send(wire.CompletionResponse{ID: id, Object: "text_completion", Created: created, Model: st.model, Choices: []wire.CompletionChoice{}, Usage: &u})
	}
	es.done()
}

// completionLogprobsOf returns the logprobs object for toks with k top
// entries, offsets counted from base; nil when k < 0 (not requested).
func completionLogprobsOf(toks []token, k, base int) *wire.CompletionLogprobs {
	if k < 0 {
		return nil
	}
	lp := &wire.CompletionLogprobs{
		Tokens:        make([]string, 0, len(toks)),
		TokenLogprobs: make([]*float64, 0, len(toks)),
		TopLogprobs:   make([]*wire.TopLogprobs, 0, len(toks)),
		TextOffset:    make([]int, 0, len(toks)),
	}
	off := base
	for _, t := range toks {
		lp.Tokens = append(lp.Tokens, t.text)
		lp.TextOffset = append(lp.TextOffset, off)
		off += len(t.text)
		if t.first {
			lp.TokenLogprobs = append(lp.TokenLogprobs, nil)
			lp.TopLogprobs = append(lp.TopLogprobs, nil)
			continue
		}
		v := t.logprob
		lp.TokenLogprobs = append(lp.TokenLogprobs, &v)
		lp.TopLogprobs = append(lp.TopLogprobs, &wire.TopLogprobs{Tokens: t.cand.toks[:k:k], Logprobs: t.cand.lps[:k:k]})
	}
	return lp
}

func joinTokens(toks []token) string {
	var b strings.Builder
	for _, t := range toks {
		b.WriteString(t.text)
	}
	return b.String()
}
