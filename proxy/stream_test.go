package proxy_test

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

func TestStreamedMissRelaysAndIsStoredForPlainRequests(t *testing.T) {
	r := newRig(t)
	plain := greedy("the river rose overnight", "logprobs", 1, "max_tokens", 10)
	streamed := greedy("the river rose overnight", "logprobs", 1, "max_tokens", 10, "stream", true)

	miss := r.complete(streamed)
	require.Equal(t, http.StatusOK, miss.status, "streamed miss: %d %q %q", miss.status, miss.cache(), miss.header.Get("Content-Type"))
	require.Equal(t, proxy.OutcomeMiss, miss.cache(), "streamed miss: %d %q %q", miss.status, miss.cache(), miss.header.Get("Content-Type"))
	require.True(t, strings.HasPrefix(miss.header.Get("Content-Type"), "text/event-stream"), "streamed miss: %d %q %q", miss.status, miss.cache(), miss.header.Get("Content-Type"))
	texts, usageChunk := streamedText(t, false, events(t, miss.body))
	want := decodeCompletion(t, r.direct("/v1/completions", plain).body)
	require.Equal(t, want.Choices[0].Text, texts[0], "streamed text %q, want %q", texts[0], want.Choices[0].Text)
	assert.Nil(t, usageChunk, "client did not ask for usage but got a usage chunk")

	hit := r.complete(plain)
	require.Equal(t, proxy.OutcomeHit, hit.cache(), "plain request after streamed miss: cache %q, want hit", hit.cache())
	got := decodeCompletion(t, hit.body)
	assert.False(t, got.Choices[0].Text != want.Choices[0].Text || got.Usage != want.Usage || got.Choices[0].FinishReason != want.Choices[0].FinishReason, "assembled answer %+v, want %+v", got, want)
	assert.Equal(t, got.Choices[0].Text, strings.Join(got.Choices[0].Logprobs.Tokens, ""), "assembled tokens do not join to the text")
}

func TestStreamedHitIsSynthesized(t *testing.T) {
	for _, tc := range []struct {
		name string
		chat bool
	}{{"completions", false}, {"chat", true}} {
		t.Run(tc.name, func(t *testing.T) {
			r := newRig(t)
			var plain map[string]any
			path := "/v1/completions"
			if tc.chat {
				path = "/v1/chat/completions"
				plain = map[string]any{"model": model, "temperature": 0, "max_tokens": 7, "logprobs": true, "top_logprobs": 2,
					"messages": []map[string]string{{"role": "user", "content": "Count the hives"}}}
			} else {
				plain = greedy("count the hives", "logprobs", 2)
			}
			first := r.post(path, plain)
			require.Equal(t, proxy.OutcomeMiss, first.cache(), "first: %q %s", first.cache(), first.body)
			streamed := map[string]any{"stream": true, "stream_options": map[string]any{"include_usage": true}}
			for k, v := range plain {
				streamed[k] = v
			}
			hit := r.post(path, streamed)
			require.Equal(t, proxy.OutcomeHit, hit.cache(), "streamed hit: %q %q %s", hit.cache(), hit.header.Get("Content-Type"), hit.body)
			require.True(t, strings.HasPrefix(hit.header.Get("Content-Type"), "text/event-stream"), "streamed hit: %q %q %s", hit.cache(), hit.header.Get("Content-Type"), hit.body)
			texts, usageChunk := streamedText(t, tc.chat, events(t, hit.body))
			var wantText string
			var wantPrompt, wantCompletion int
			if tc.chat {
				a := decodeChat(t, first.body)
				wantText, wantPrompt, wantCompletion = a.Choices[0].Message.Content, a.Usage.PromptTokens, a.Usage.CompletionTokens
			} else {
				a := decodeCompletion(t, first.body)
				wantText, wantPrompt, wantCompletion = a.Choices[0].Text, a.Usage.PromptTokens, a.Usage.CompletionTokens
			}
			assert.Equal(t, wantText, texts[0], "synthesized text %q, want %q", texts[0], wantText)
			if assert.NotNil(t, usageChunk, "usage chunk %+v, want prompt %d completion %d", usageChunk, wantPrompt, wantCompletion) {
				assert.Equal(t, wantPrompt, usageChunk.Usage.PromptTokens, "usage chunk %+v, want prompt %d completion %d", usageChunk, wantPrompt, wantCompletion)
				assert.Equal(t, wantCompletion, usageChunk.Usage.CompletionTokens, "usage chunk %+v, want prompt %d completion %d", usageChunk, wantPrompt, wantCompletion)
			}
			assert.Equal(t, 1, r.upstreamGenerations(), "upstream calls %d, want 1", r.upstreamGenerations())
		})
	}
}

func TestStreamedChatMissAssembles(t *testing.T) {
	r := newRig(t)
	body := map[string]any{"model": model, "temperature": 0, "max_tokens": 9, "logprobs": true, "top_logprobs": 3,
		"messages": []map[string]string{{"role": "user", "content": "What does the lock keeper say?"}}}
	streamed := map[string]any{"stream": true}
	for k, v := range body {
		streamed[k] = v
	}
	miss := r.chat(streamed)
	texts, _ := streamedText(t, true, events(t, miss.body))
	hit := r.chat(body)
	require.Equal(t, proxy.OutcomeHit, hit.cache(), "cache %q, want hit", hit.cache())
	got := decodeChat(t, hit.body)
	want := decodeChat(t, r.direct("/v1/chat/completions", body).body)
	assert.Equal(t, want.Choices[0].Message.Content, texts[0], "streamed text")
	assert.Equal(t, want.Choices[0].Message.Content, got.Choices[0].Message.Content, "assembled text")
	assert.Len(t, got.Choices[0].Logprobs.Content, len(want.Choices[0].Logprobs.Content), "assembled logprob entries")
	gb, _ := json.Marshal(got.Choices[0].Logprobs)
	wb, _ := json.Marshal(want.Choices[0].Logprobs)
	assert.Equal(t, string(wb), string(gb), "assembled logprobs\n%s\nwant\n%s", gb, wb)
}

func TestStreamedBatchAllMissAndPartial(t *testing.T) {
	r := newRig(t)
	r.complete(greedy([]string{"one barge"}))
	resp := r.complete(greedy([]string{"two barges", "one barge", "three barges"}, "stream", true))
	require.Equal(t, proxy.OutcomePartial, resp.cache(), "cache %q, want partial", resp.cache())
	texts, _ := streamedText(t, false, events(t, resp.body))
	for i, p := range []string{"two barges", "one barge", "three barges"} {
		want := decodeCompletion(t, r.direct("/v1/completions", greedy(p)).body)
		assert.Equal(t, want.Choices[0].Text, texts[i], "prompt %d: streamed %q, want %q", i, texts[i], want.Choices[0].Text)
	}
	all := r.complete(greedy([]string{"four barges", "five barges"}, "stream", true))
	require.Equal(t, proxy.OutcomeMiss, all.cache(), "cache %q, want miss", all.cache())
	texts, _ = streamedText(t, false, events(t, all.body))
	require.Len(t, texts, 2, "streamed %d choices, want 2", len(texts))
	got := r.complete(greedy([]string{"five barges"}))
	assert.Equal(t, proxy.OutcomeHit, got.cache(), "prompt from a streamed batch: cache %q, want hit", got.cache())
}
