package proxy_test

import (
	"context"
	"errors"
	"io"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

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
		require.NoError(t, err)
		before := r.upstreamGenerations()
		b, err := client.CreateCompletion(ctx, req)
		require.NoError(t, err)
		assert.Equal(t, before, r.upstreamGenerations(), "second identical call reached the upstream")
		assert.False(t, a.Choices[0].Text != b.Choices[0].Text || *a.Usage != *b.Usage, "answers differ: %+v vs %+v", a, b)
		assert.NotEqual(t, 0, len(b.Choices[0].LogProbs.Tokens), "SDK decoded no logprob tokens from the cached answer")
	})
	t.Run("batched", func(t *testing.T) {
		req := openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: []string{"hive one", "hive two", "hive three"}, MaxTokens: 5}
		// go-openai drops a zero temperature; it documents this value for greedy decoding.
		req.Temperature = math.SmallestNonzeroFloat32
		a, err := client.CreateCompletion(ctx, req)
		require.NoError(t, err)
		require.Len(t, a.Choices, 3, "%d choices, want 3", len(a.Choices))
		req.Prompt = []string{"hive three", "hive four"}
		before := r.up.Prompts()
		b, err := client.CreateCompletion(ctx, req)
		require.NoError(t, err)
		assert.Equal(t, before+1, r.up.Prompts(), "upstream answered %d prompts, want 1", r.up.Prompts()-before)
		assert.False(t, b.Choices[0].Text != a.Choices[2].Text || b.Choices[0].Index != 0 || b.Choices[1].Index != 1, "merged batch wrong: %+v", b.Choices)
	})
	t.Run("streamed", func(t *testing.T) {
		req := openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: "streaming by the weir", MaxTokens: 9, Stream: true, Temperature: math.SmallestNonzeroFloat32}
		var texts [2]string
		for i := range 2 {
			s, err := client.CreateCompletionStream(ctx, req)
			require.NoError(t, err)
			for {
				chunk, err := s.Recv()
				if errors.Is(err, io.EOF) {
					break
				}
				require.NoError(t, err, "stream %d", i)
				for _, c := range chunk.Choices {
					texts[i] += c.Text
				}
			}
			s.Close()
		}
		assert.False(t, texts[0] == "" || texts[0] != texts[1], "streamed texts %q and %q", texts[0], texts[1])
	})
	t.Run("chat", func(t *testing.T) {
		//lint:ignore SA1019 max_tokens is the field of the wire format stint serves; the SDK sends it through MaxTokens
		req := openai.ChatCompletionRequest{Model: upstreamtest.ModelSmall, MaxTokens: 7, Temperature: math.SmallestNonzeroFloat32, LogProbs: true, TopLogProbs: 3,
			Messages: []openai.ChatCompletionMessage{{Role: openai.ChatMessageRoleUser, Content: "Which barge carries the queen?"}}}
		a, err := client.CreateChatCompletion(ctx, req)
		require.NoError(t, err)
		resp, err := client.CreateChatCompletion(ctx, req)
		require.NoError(t, err)
		assert.Equal(t, a.Choices[0].Message.Content, resp.Choices[0].Message.Content, "chat answers differ")
		assert.NotEmpty(t, resp.Choices[0].LogProbs.Content, "chat answer lacks logprobs: %+v", resp.Choices[0])
		hdr := resp.Header().Get(proxy.HeaderCacheStatus)
		cs, ok := proxy.ParseCacheStatus(resp.Header())
		if assert.True(t, ok, "second chat call: Cache-Status %q, want stint's member with hit (RFC 9211 §2.1)", hdr) {
			assert.True(t, cs.Hit, "second chat call: Cache-Status %q, want stint's member with hit (RFC 9211 §2.1)", hdr)
			assert.Equal(t, "", cs.Fwd, "second chat call: Cache-Status %q, want stint's member with hit (RFC 9211 §2.1)", hdr)
		}
		//lint:ignore SA1019 max_tokens is the field of the wire format stint serves; the SDK sends it through MaxTokens
		s, err := client.CreateChatCompletionStream(ctx, openai.ChatCompletionRequest{Model: req.Model, MaxTokens: 7, Temperature: req.Temperature, Messages: req.Messages, Stream: true})
		require.NoError(t, err)
		defer s.Close()
		text := ""
		for {
			chunk, err := s.Recv()
			if errors.Is(err, io.EOF) {
				break
			}
			require.NoError(t, err)
			for _, c := range chunk.Choices {
				text += c.Delta.Content
			}
		}
		assert.Equal(t, a.Choices[0].Message.Content, text, "streamed chat %q, want %q", text, a.Choices[0].Message.Content)
	})
}
