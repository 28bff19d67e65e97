package proxy_test

import (
	"context"
	"errors"
	"io"
	"math"
	"testing"

	openai "github.com/sashabaranov/go-openai"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestRealClientLibrary drives the proxy with a real client library of the
// wire format, as a user's tuning job would: plain, batched, streamed, chat.
func TestRealClientLibrary(t *testing.T) {
	r := newRig(t, withTeams(teamWithKey("lab", "sdk-key")))
	cfg := openai.DefaultConfig("sdk-key")
	cfg.BaseURL = r.srv.URL + "/v1"
	client := openai.NewClientWithConfig(cfg)
	ctx := context.Background()

	t.Run("plain completion twice", func(t *testing.T) {
		req := openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: "The bees swarmed near the sluice", MaxTokens: 8, Temperature: math.SmallestNonzeroFloat32, LogProbs: 2}
		a, err := client.CreateCompletion(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		before := r.upstreamGenerations()
		b, err := client.CreateCompletion(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		if r.upstreamGenerations() != before {
			t.Error("second identical call reached the upstream")
		}
		if a.Choices[0].Text != b.Choices[0].Text || *a.Usage != *b.Usage {
			t.Errorf("answers differ: %+v vs %+v", a, b)
		}
		if len(b.Choices[0].LogProbs.Tokens) == 0 {
			t.Error("SDK decoded no logprob tokens from the cached answer")
		}
	})
	t.Run("batched", func(t *testing.T) {
		req := openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: []string{"hive one", "hive two", "hive three"}, MaxTokens: 5}
		// go-openai drops a zero temperature; it documents this value for greedy decoding.
		req.Temperature = math.SmallestNonzeroFloat32
		a, err := client.CreateCompletion(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		if len(a.Choices) != 3 {
			t.Fatalf("%d choices, want 3", len(a.Choices))
		}
		req.Prompt = []string{"hive three", "hive four"}
		before := r.up.Prompts()
		b, err := client.CreateCompletion(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		if r.up.Prompts() != before+1 {
			t.Errorf("upstream answered %d prompts, want 1", r.up.Prompts()-before)
		}
		if b.Choices[0].Text != a.Choices[2].Text || b.Choices[0].Index != 0 || b.Choices[1].Index != 1 {
			t.Errorf("merged batch wrong: %+v", b.Choices)
		}
	})
	t.Run("streamed", func(t *testing.T) {
		req := openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: "streaming by the weir", MaxTokens: 9, Stream: true, Temperature: math.SmallestNonzeroFloat32}
		var texts [2]string
		for i := range 2 {
			s, err := client.CreateCompletionStream(ctx, req)
			if err != nil {
				t.Fatal(err)
			}
			for {
				chunk, err := s.Recv()
				if errors.Is(err, io.EOF) {
					break
				}
				if err != nil {
					t.Fatalf("stream %d: %v", i, err)
				}
				for _, c := range chunk.Choices {
					texts[i] += c.Text
				}
			}
			s.Close()
		}
		if texts[0] == "" || texts[0] != texts[1] {
			t.Errorf("streamed texts %q and %q", texts[0], texts[1])
		}
	})
	t.Run("chat", func(t *testing.T) {
		//lint:ignore SA1019 max_tokens is the field of the wire format stint serves; the SDK sends it through MaxTokens
		req := openai.ChatCompletionRequest{Model: upstreamtest.ModelSmall, MaxTokens: 7, Temperature: math.SmallestNonzeroFloat32, LogProbs: true, TopLogProbs: 3,
			Messages: []openai.ChatCompletionMessage{{Role: openai.ChatMessageRoleUser, Content: "Which barge carries the queen?"}}}
		a, err := client.CreateChatCompletion(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		resp, err := client.CreateChatCompletion(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		if resp.Choices[0].Message.Content != a.Choices[0].Message.Content || len(resp.Choices[0].LogProbs.Content) == 0 {
			t.Errorf("chat answers differ or lack logprobs: %+v", resp.Choices[0])
		}
		hdr := resp.Header().Get(proxy.HeaderCacheStatus)
		if cs, ok := proxy.ParseCacheStatus(resp.Header()); !ok || !cs.Hit || cs.Fwd != "" {
			t.Errorf("second chat call: Cache-Status %q, want stint's member with hit (RFC 9211 §2.1)", hdr)
		}
		//lint:ignore SA1019 max_tokens is the field of the wire format stint serves; the SDK sends it through MaxTokens
		s, err := client.CreateChatCompletionStream(ctx, openai.ChatCompletionRequest{Model: req.Model, MaxTokens: 7, Temperature: req.Temperature, Messages: req.Messages, Stream: true})
		if err != nil {
			t.Fatal(err)
		}
		defer s.Close()
		text := ""
		for {
			chunk, err := s.Recv()
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatal(err)
			}
			for _, c := range chunk.Choices {
				text += c.Delta.Content
			}
		}
		if text != a.Choices[0].Message.Content {
			t.Errorf("streamed chat %q, want %q", text, a.Choices[0].Message.Content)
		}
	})
}
