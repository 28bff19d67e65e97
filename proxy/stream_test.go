package proxy_test

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"

	"github.com/stintlab/stint/proxy"
)

func TestStreamedMissRelaysAndIsStoredForPlainRequests(t *testing.T) {
	r := newRig(t)
	plain := greedy("the river rose overnight", "logprobs", 1, "max_tokens", 10)
	streamed := greedy("the river rose overnight", "logprobs", 1, "max_tokens", 10, "stream", true)

	miss := r.complete(streamed)
	if miss.status != http.StatusOK || miss.cache() != proxy.OutcomeMiss || !strings.HasPrefix(miss.header.Get("Content-Type"), "text/event-stream") {
		t.Fatalf("streamed miss: %d %q %q", miss.status, miss.cache(), miss.header.Get("Content-Type"))
	}
	texts, usageChunk := streamedText(t, false, events(t, miss.body))
	want := decodeCompletion(t, r.direct("/v1/completions", plain).body)
	if texts[0] != want.Choices[0].Text {
		t.Fatalf("streamed text %q, want %q", texts[0], want.Choices[0].Text)
	}
	if usageChunk != nil {
		t.Error("client did not ask for usage but got a usage chunk")
	}

	hit := r.complete(plain)
	if hit.cache() != proxy.OutcomeHit {
		t.Fatalf("plain request after streamed miss: cache %q, want hit", hit.cache())
	}
	got := decodeCompletion(t, hit.body)
	if got.Choices[0].Text != want.Choices[0].Text || got.Usage != want.Usage || got.Choices[0].FinishReason != want.Choices[0].FinishReason {
		t.Errorf("assembled answer %+v, want %+v", got, want)
	}
	if strings.Join(got.Choices[0].Logprobs.Tokens, "") != got.Choices[0].Text {
		t.Error("assembled tokens do not join to the text")
	}
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
			if first.cache() != proxy.OutcomeMiss {
				t.Fatalf("first: %q %s", first.cache(), first.body)
			}
			streamed := map[string]any{"stream": true, "stream_options": map[string]any{"include_usage": true}}
			for k, v := range plain {
				streamed[k] = v
			}
			hit := r.post(path, streamed)
			if hit.cache() != proxy.OutcomeHit || !strings.HasPrefix(hit.header.Get("Content-Type"), "text/event-stream") {
				t.Fatalf("streamed hit: %q %q %s", hit.cache(), hit.header.Get("Content-Type"), hit.body)
			}
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
			if texts[0] != wantText {
				t.Errorf("synthesized text %q, want %q", texts[0], wantText)
			}
			if usageChunk == nil || usageChunk.Usage.PromptTokens != wantPrompt || usageChunk.Usage.CompletionTokens != wantCompletion {
				t.Errorf("usage chunk %+v, want prompt %d completion %d", usageChunk, wantPrompt, wantCompletion)
			}
			if r.upstreamGenerations() != 1 {
				t.Errorf("upstream calls %d, want 1", r.upstreamGenerations())
			}
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
	if hit.cache() != proxy.OutcomeHit {
		t.Fatalf("cache %q, want hit", hit.cache())
	}
	got := decodeChat(t, hit.body)
	want := decodeChat(t, r.direct("/v1/chat/completions", body).body)
	if texts[0] != want.Choices[0].Message.Content || got.Choices[0].Message.Content != want.Choices[0].Message.Content {
		t.Errorf("streamed %q, assembled %q, want %q", texts[0], got.Choices[0].Message.Content, want.Choices[0].Message.Content)
	}
	if len(got.Choices[0].Logprobs.Content) != len(want.Choices[0].Logprobs.Content) {
		t.Errorf("assembled %d logprob entries, want %d", len(got.Choices[0].Logprobs.Content), len(want.Choices[0].Logprobs.Content))
	}
	gb, _ := json.Marshal(got.Choices[0].Logprobs)
	wb, _ := json.Marshal(want.Choices[0].Logprobs)
	if string(gb) != string(wb) {
		t.Errorf("assembled logprobs\n%s\nwant\n%s", gb, wb)
	}
}

func TestStreamedBatchAllMissAndPartial(t *testing.T) {
	r := newRig(t)
	r.complete(greedy([]string{"one barge"}))
	resp := r.complete(greedy([]string{"two barges", "one barge", "three barges"}, "stream", true))
	if resp.cache() != proxy.OutcomePartial {
		t.Fatalf("cache %q, want partial", resp.cache())
	}
	texts, _ := streamedText(t, false, events(t, resp.body))
	for i, p := range []string{"two barges", "one barge", "three barges"} {
		want := decodeCompletion(t, r.direct("/v1/completions", greedy(p)).body)
		if texts[i] != want.Choices[0].Text {
			t.Errorf("prompt %d: streamed %q, want %q", i, texts[i], want.Choices[0].Text)
		}
	}
	all := r.complete(greedy([]string{"four barges", "five barges"}, "stream", true))
	if all.cache() != proxy.OutcomeMiss {
		t.Fatalf("cache %q, want miss", all.cache())
	}
	texts, _ = streamedText(t, false, events(t, all.body))
	if len(texts) != 2 {
		t.Fatalf("streamed %d choices, want 2", len(texts))
	}
	if got := r.complete(greedy([]string{"five barges"})); got.cache() != proxy.OutcomeHit {
		t.Errorf("prompt from a streamed batch: cache %q, want hit", got.cache())
	}
}
