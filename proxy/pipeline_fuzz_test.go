package proxy

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net/http/httptest"
	"slices"
	"sort"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/wire"
)

// fuzzMaxPrompts is the prompt cap the fuzz target parses under.
const fuzzMaxPrompts = 16

// FuzzPipeline feeds arbitrary request bodies and answer material through
// the pipeline's pure parts and checks what must hold for every input:
//
//   - parsing: a request is refused with a 400 in the wire error shape, or
//     it parses to a model, 1 to fuzzMaxPrompts valid prompt items and an n
//     in range; every item's cache key is canonical JSON, and the body the
//     proxy sends upstream parses again to the same keys (so the proxy's
//     own rewrite never changes what it caches under);
//   - batch split and merge: an upstream answer for several prompts, its
//     choices in any order, splits into one answer per prompt whose usage
//     adds up exactly, and merging those gives back every choice's text at
//     its index, and the usage;
//   - shaping: a stored answer with token data cut to fewer tokens and
//     fewer top log-probabilities keeps the first tokens, their text and
//     the most likely entries;
//   - streaming: an answer written as an event stream and assembled again
//     has the same text per choice and the same usage.
func FuzzPipeline(f *testing.F) {
	for _, seed := range []struct {
		body     string
		material []byte
	}{
		{`{"model":"quill-small","prompt":["a","b","c"],"n":2,"temperature":0,"max_tokens":4}`, []byte("the barge\x00sails at dawn")},
		{`{"model":"quill-small","prompt":[[1,2],[3]],"logprobs":2,"stream":true,"stream_options":{"include_usage":false}}`, []byte{3, 1, 250, 7, 9}},
		{`{"model":"m","messages":[{"role":"user","content":"hi"}],"logprobs":true,"top_logprobs":3}`, []byte("é🌼x")},
		{`{"model":"m","prompt":"one","user":"u","seed":1e3,"stop":["\n"]}`, nil},
		{`{"model":"m","prompt":[]}`, []byte{0}},
		{`{"model":"m","prompt":"a","prompt":"b"}`, []byte{1}},
		{`{"model":"m","prompt":"x","n":1.5}`, []byte{2}},
		{`not json`, []byte{}},
	} {
		f.Add([]byte(seed.body), seed.material)
	}
	f.Fuzz(func(t *testing.T, body, material []byte) {
		for _, ep := range []endpoint{endpointCompletions, endpointChat} {
			checkParse(t, ep, body)
		}
		m := newMaterial(material)
		checkSplitMerge(t, m)
		checkShape(t, m)
	})
}

// checkParse is the parsing property of FuzzPipeline.
func checkParse(t *testing.T, ep endpoint, body []byte) {
	req, aerr := parseRequest(ep, body, fuzzMaxPrompts)
	if aerr != nil {
		require.Equal(t, 400, aerr.status, "%s refusal %d %q, want a 400 with a message", ep, aerr.status, aerr.message)
		require.NotEqual(t, "", aerr.message, "%s refusal %d %q, want a 400 with a message", ep, aerr.status, aerr.message)
		rec := httptest.NewRecorder()
		writeError(rec, aerr)
		var e wire.ErrorBody
		require.NoError(t, json.Unmarshal(rec.Body.Bytes(), &e), "refusal body %s is not the wire error shape", rec.Body.Bytes())
		require.NotEqual(t, "", e.Error.Message, "refusal body %s has no message", rec.Body.Bytes())
		require.NotEqual(t, "", e.Error.Type, "refusal body %s has no type", rec.Body.Bytes())
		return
	}
	require.NotEqual(t, "", req.model, "parsed model %q n %d", req.model, req.n)
	require.GreaterOrEqual(t, req.n, 1, "parsed model %q n %d", req.model, req.n)
	require.LessOrEqual(t, req.n, maxN, "parsed model %q n %d", req.model, req.n)
	items := []json.RawMessage{nil}
	if ep == endpointCompletions {
		require.NotEqual(t, 0, len(req.prompts), "%d prompt items, want 1 to %d", len(req.prompts), fuzzMaxPrompts)
		require.LessOrEqual(t, len(req.prompts), fuzzMaxPrompts, "%d prompt items, want 1 to %d", len(req.prompts), fuzzMaxPrompts)
		items = req.prompts
	}
	keys := make([]string, len(items))
	for i, it := range items {
		require.False(t, it != nil && !json.Valid(it), "prompt item %d is not JSON: %q", i, it)
		k, err := keyBody(req, it)
		require.NoError(t, err, "key of a parsed request")
		require.True(t, json.Valid(k), "key %q is not JSON", k)
		again, _ := keyBody(req, it)
		require.True(t, bytes.Equal(k, again), "key differs between two computations: %q, %q", k, again)
		keys[i] = string(k)
	}
	for _, stream := range []bool{false, true} {
		up, err := upstreamBody(req, nil, stream)
		require.NoError(t, err, "upstream body")
		back, aerr := parseRequest(ep, up, fuzzMaxPrompts)
		require.Nil(t, aerr, "the upstream body %s does not parse again: %v", up, aerr)
		require.Equal(t, stream, back.stream, "upstream body stream = %v, want %v", back.stream, stream)
		require.False(t, stream && !back.includeUsage, "a relayed stream does not ask for the usage chunk: %s", up)
		backItems := []json.RawMessage{nil}
		if ep == endpointCompletions {
			backItems = back.prompts
		}
		require.Len(t, backItems, len(items), "upstream body has %d prompt items, want %d", len(backItems), len(items))
		for i, it := range backItems {
			k, err := keyBody(back, it)
			require.NoError(t, err, "key of upstream item %d", i)
			require.Equal(t, keys[i], string(k), "upstream body changes the key of item %d", i)
		}
	}
}

// material hands out bytes of a fuzz input as small numbers and strings,
// zeros once it runs out.
type material struct {
	b []byte
}

func newMaterial(b []byte) *material { return &material{b: b} }

func (m *material) byte() byte {
	if len(m.b) == 0 {
		return 0
	}
	c := m.b[0]
	m.b = m.b[1:]
	return c
}

// intn returns a number in [0, n).
func (m *material) intn(n int) int { return int(m.byte()) % n }

// text returns up to max bytes as a string (invalid UTF-8 included).
func (m *material) text(max int) string {
	n := min(m.intn(max+1), len(m.b))
	s := string(m.b[:n])
	m.b = m.b[n:]
	return s
}

// canonText is s as it reads back from JSON (invalid UTF-8 replaced).
func canonText(s string) string {
	b, _ := json.Marshal(s)
	var out string
	_ = json.Unmarshal(b, &out)
	return out
}

// checkSplitMerge is the batch property of FuzzPipeline.
func checkSplitMerge(t *testing.T, m *material) {
	k, n := 1+m.intn(6), 1+m.intn(3)
	req := &request{endpoint: endpointCompletions, n: n, logprobs: noLevel, maxTokens: noLevel, promptsArray: k > 1}
	prompts := make([]json.RawMessage, k)
	for i := range prompts {
		prompts[i], _ = json.Marshal(m.text(12))
	}
	texts := make([]string, k*n)
	choices := make([]map[string]any, k*n)
	for i := range choices {
		texts[i] = m.text(10)
		choices[i] = map[string]any{"index": i, "text": texts[i], "logprobs": nil, "finish_reason": "length"}
	}
	// The upstream may list the choices in any order.
	for i := len(choices) - 1; i > 0; i-- {
		j := m.intn(i + 1)
		choices[i], choices[j] = choices[j], choices[i]
	}
	total := wire.Usage{PromptTokens: m.intn(200), CompletionTokens: m.intn(200)}
	total.TotalTokens = total.PromptTokens + total.CompletionTokens
	full, _ := json.Marshal(map[string]any{"id": "cmpl-f", "object": "text_completion", "model": "m", "choices": choices, "usage": total})

	parts, err := splitAnswer(req, full, k, prompts)
	require.NoError(t, err, "split %s", full)
	require.Len(t, parts, k, "split into %d answers, want %d", len(parts), k)
	var sum wire.Usage
	for j, p := range parts {
		var a struct {
			Choices []struct {
				Index int    `json:"index"`
				Text  string `json:"text"`
			} `json:"choices"`
		}
		require.NoError(t, json.Unmarshal(p.body, &a), "answer %d: %s", j, p.body)
		require.Len(t, a.Choices, n, "answer %d: %s", j, p.body)
		for _, ch := range a.Choices {
			require.GreaterOrEqual(t, ch.Index, 0, "answer %d choice %d has text %q, want %q", j, ch.Index, ch.Text, canonText(texts[j*n+ch.Index]))
			require.Less(t, ch.Index, n, "answer %d choice %d has text %q, want %q", j, ch.Index, ch.Text, canonText(texts[j*n+ch.Index]))
			require.Equal(t, canonText(texts[j*n+ch.Index]), ch.Text, "answer %d choice %d has text %q, want %q", j, ch.Index, ch.Text, canonText(texts[j*n+ch.Index]))
		}
		sum = sum.Add(p.usage)
	}
	require.Equal(t, total.PromptTokens, sum.PromptTokens, "split usage adds up to %+v, want %+v", sum, total)
	require.Equal(t, total.CompletionTokens, sum.CompletionTokens, "split usage adds up to %+v, want %+v", sum, total)

	merged, mu, err := mergeAnswers(req, parts)
	require.NoError(t, err, "merge")
	require.Equal(t, total.PromptTokens, mu.PromptTokens, "merged usage %+v, want %+v", mu, total)
	require.Equal(t, total.CompletionTokens, mu.CompletionTokens, "merged usage %+v, want %+v", mu, total)
	got := choiceTexts(t, endpointCompletions, merged)
	want := make(map[int]string, len(texts))
	for i, s := range texts {
		want[i] = canonText(s)
	}
	require.True(t, mapsEqual(got, want), "merged texts %v, want %v", got, want)
	checkStream(t, endpointCompletions, merged, want, total)
}

// choiceTexts reads an answer's choices' texts by index.
func choiceTexts(t *testing.T, ep endpoint, body []byte) map[int]string {
	t.Helper()
	var a struct {
		Choices []struct {
			Index   int    `json:"index"`
			Text    string `json:"text"`
			Message struct {
				Content string `json:"content"`
			} `json:"message"`
		} `json:"choices"`
	}
	require.NoError(t, json.Unmarshal(body, &a), "answer %s", body)
	out := map[int]string{}
	for _, c := range a.Choices {
		_, dup := out[c.Index]
		require.False(t, dup, "index %d twice in %s", c.Index, body)
		if ep == endpointChat {
			out[c.Index] = c.Message.Content
		} else {
			out[c.Index] = c.Text
		}
	}
	return out
}

func mapsEqual(a, b map[int]string) bool {
	if len(a) != len(b) {
		return false
	}
	for k, v := range a {
		if w, ok := b[k]; !ok || w != v {
			return false
		}
	}
	return true
}

// checkStream writes body as an event stream, assembles it again and
// compares texts and usage.
func checkStream(t *testing.T, ep endpoint, body []byte, want map[int]string, u wire.Usage) {
	t.Helper()
	rec := httptest.NewRecorder()
	require.NoError(t, writeStream(rec, ep, body, true, OutcomeHit), "write stream of %s", body)
	asm := newAssembler(ep)
	rd := sse.NewReader(bytes.NewReader(rec.Body.Bytes()))
	done := false
	for {
		ev, err := rd.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err, "read the stream: %v\n%s", err, rec.Body.Bytes())
		if ev.IsDone() {
			done = true
			continue
		}
		_, err = asm.add([]byte(ev.Data))
		require.NoError(t, err, "assemble")
	}
	require.True(t, done, "stream without [DONE]:\n%s", rec.Body.Bytes())
	again, err := asm.result()
	require.NoError(t, err, "assembled")
	got := choiceTexts(t, ep, again)
	require.True(t, mapsEqual(got, want), "streamed and assembled texts %v, want %v", got, want)
	ru, ok := asm.reportedUsage()
	require.True(t, ok, "streamed usage %+v (%v), want %+v", ru, ok, u)
	require.Equal(t, u.PromptTokens, ru.PromptTokens, "streamed usage %+v (%v), want %+v", ru, ok, u)
	require.Equal(t, u.CompletionTokens, ru.CompletionTokens, "streamed usage %+v (%v), want %+v", ru, ok, u)
}

// checkShape is the shaping property of FuzzPipeline.
func checkShape(t *testing.T, m *material) {
	ntok, k := 1+m.intn(8), m.intn(5)
	tokens := make([]string, ntok)
	lps := make([]*float64, ntok)
	tops := make([]json.RawMessage, ntok)
	offsets := make([]int, ntok)
	entries := make([][]float64, ntok) // each position's top log-probabilities
	off := 0
	for i := range tokens {
		tokens[i] = canonText(m.text(4))
		lp := -float64(m.intn(50)) / 7
		lps[i] = &lp
		offsets[i] = off
		off += len(tokens[i])
		var b strings.Builder
		b.WriteByte('{')
		for e := range k {
			v := -float64(m.intn(40)) / 3
			entries[i] = append(entries[i], v)
			if e > 0 {
				b.WriteByte(',')
			}
			fmt.Fprintf(&b, `"t%d":%s`, e, jsonFloat(v))
		}
		b.WriteByte('}')
		tops[i] = json.RawMessage(b.String())
	}
	lp := map[string]any{"tokens": tokens, "token_logprobs": lps, "top_logprobs": tops, "text_offset": offsets}
	text := strings.Join(tokens, "")
	u := wire.Usage{PromptTokens: 3, CompletionTokens: ntok, TotalTokens: 3 + ntok}
	stored, _ := json.Marshal(map[string]any{"id": "cmpl-s", "object": "text_completion", "model": "m",
		"choices": []any{map[string]any{"index": 0, "text": text, "logprobs": lp, "finish_reason": "length"}}, "usage": u})
	v := variant{Logprobs: k, MaxTokens: ntok, Tokens: ntok, Usage: u, Body: stored}

	wantMax, wantLP := 1+m.intn(ntok), m.intn(k+1)-1 // wantLP -1: no log-probabilities
	body, su, err := shape(endpointCompletions, v, wantLP, wantMax)
	require.NoError(t, err, "shape %s to %d tokens, %d top", stored, wantMax, wantLP)
	var a struct {
		Choices []struct {
			Text     string `json:"text"`
			Logprobs *struct {
				Tokens      []string                     `json:"tokens"`
				TopLogprobs []map[string]json.RawMessage `json:"top_logprobs"`
			} `json:"logprobs"`
		} `json:"choices"`
	}
	err = json.Unmarshal(body, &a)
	require.NoError(t, err, "shaped answer %s: %v", body, err)
	require.Len(t, a.Choices, 1, "shaped answer %s: %v", body, err)
	c := a.Choices[0]
	want := strings.Join(tokens[:wantMax], "")
	require.Equal(t, want, c.Text, "shaped text %q, want the first %d tokens %q", c.Text, wantMax, want)
	require.False(t, wantMax < ntok && su.CompletionTokens != wantMax, "shaped usage %+v, want %d completion tokens", su, wantMax)
	if wantLP == noLevel {
		require.Nil(t, c.Logprobs, "log-probabilities kept when none were asked for: %s", body)
		return
	}
	require.NotNil(t, c.Logprobs, "shaped logprobs %s, want the first %d tokens", body, wantMax)
	require.True(t, slices.Equal(c.Logprobs.Tokens, tokens[:wantMax]), "shaped logprobs %s, want the first %d tokens", body, wantMax)
	require.Len(t, c.Logprobs.TopLogprobs, wantMax, "shaped logprobs %s, want the first %d tokens", body, wantMax)
	for i, top := range c.Logprobs.TopLogprobs {
		require.Len(t, top, min(wantLP, k), "position %d kept %d top entries, want %d", i, len(top), min(wantLP, k))
		best := slices.Clone(entries[i])
		sort.Sort(sort.Reverse(sort.Float64Slice(best)))
		var kept []float64
		for _, raw := range top {
			var f float64
			_ = json.Unmarshal(raw, &f)
			kept = append(kept, f)
		}
		sort.Sort(sort.Reverse(sort.Float64Slice(kept)))
		require.True(t, slices.Equal(kept, best[:len(kept)]), "position %d kept %v, want the most likely %v", i, kept, best[:len(kept)])
	}
}

// jsonFloat writes v as JSON.
func jsonFloat(v float64) string {
	if math.IsInf(v, 0) || math.IsNaN(v) {
		return "0"
	}
	b, _ := json.Marshal(v)
	return string(b)
}
