package upstreamtest_test

import (
	"context"
	"errors"
	"io"
	"math"
	"net/http"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	openai "github.com/sashabaranov/go-openai"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// greedy is the temperature the SDK tests send for greedy decoding: the
// SDK drops a temperature of 0 (its field is "omitempty"), which the wire
// format would read as the default 1, so callers of this SDK send the
// smallest positive float instead, which the toy model decodes greedily.
const greedy = math.SmallestNonzeroFloat32

func sdkClient(tb testing.TB, up *upstreamtest.Server, key string) *openai.Client {
	tb.Helper()
	cfg := openai.DefaultConfig(key)
	cfg.BaseURL = up.URL()
	return openai.NewClientWithConfig(cfg)
}

func TestSDKCompletion(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{Key: "up-key"})
	defer up.Close()
	c := sdkClient(t, up, "up-key")
	ctx := context.Background()

	long, err := c.CreateCompletion(ctx, openai.CompletionRequest{
		Model: upstreamtest.ModelSmall, Prompt: "The apprentice lifts the frame", MaxTokens: 30, Temperature: greedy, LogProbs: 5,
	})
	require.NoError(t, err)
	assert.Equal(t, "text_completion", long.Object, "object %q model %q request id %q", long.Object, long.Model, long.Header().Get("x-request-id"))
	assert.Equal(t, upstreamtest.ModelSmall, long.Model, "object %q model %q request id %q", long.Object, long.Model, long.Header().Get("x-request-id"))
	assert.NotEqual(t, "", long.Header().Get("x-request-id"), "object %q model %q request id %q", long.Object, long.Model, long.Header().Get("x-request-id"))
	lc := long.Choices[0]
	checkSDKLogprobs(t, lc.Text, lc.LogProbs, 5)
	if assert.NotNil(t, long.Usage, "usage %+v; want 5 prompt tokens and %d completion tokens", long.Usage, len(lc.LogProbs.Tokens)) {
		assert.Equal(t, 5, long.Usage.PromptTokens, "usage %+v; want 5 prompt tokens and %d completion tokens", long.Usage, len(lc.LogProbs.Tokens))
		if assert.Equal(t, len(lc.LogProbs.Tokens), long.Usage.CompletionTokens, "usage %+v; want 5 prompt tokens and %d completion tokens", long.Usage, len(lc.LogProbs.Tokens)) {
			assert.Equal(t, 5+len(lc.LogProbs.Tokens), long.Usage.TotalTokens, "usage %+v; want 5 prompt tokens and %d completion tokens", long.Usage, len(lc.LogProbs.Tokens))
		}
	}

	// Greedy prefix property through the SDK.
	short, err := c.CreateCompletion(ctx, openai.CompletionRequest{
		Model: upstreamtest.ModelSmall, Prompt: "The apprentice lifts the frame", MaxTokens: 10, Temperature: greedy, LogProbs: 1,
	})
	require.NoError(t, err)
	n := min(10, len(lc.LogProbs.Tokens))
	got, want := short.Choices[0].Text, strings.Join(lc.LogProbs.Tokens[:n], "")
	assert.Equal(t, want, got, "10-token answer %q; want the first 10 tokens of the 30-token answer, %q", got, want)

	// Array prompt with n=2: index = prompt*n + j, and each prompt's
	// choices match its single answer.
	prompts := []string{"Clover", "The tide turns at the lock", "Jars"}
	batch, err := c.CreateCompletion(ctx, openai.CompletionRequest{
		Model: upstreamtest.ModelSmall, Prompt: prompts, MaxTokens: 8, Temperature: greedy, N: 2, LogProbs: 2,
	})
	require.NoError(t, err)
	require.Len(t, batch.Choices, 6, "%d choices; want 6", len(batch.Choices))
	promptTokens, completionTokens := 0, 0
	for i, p := range prompts {
		one, err := c.CreateCompletion(ctx, openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: p, MaxTokens: 8, Temperature: greedy})
		require.NoError(t, err)
		promptTokens += one.Usage.PromptTokens
		for j := range 2 {
			ch := batch.Choices[i*2+j]
			assert.False(t, ch.Index != i*2+j || ch.Text != one.Choices[0].Text, "choice %d (index %d) = %q; want prompt %d's answer %q", i*2+j, ch.Index, ch.Text, i, one.Choices[0].Text)
			checkSDKLogprobs(t, ch.Text, ch.LogProbs, 2)
			completionTokens += len(ch.LogProbs.Tokens)
		}
	}
	assert.Equal(t, promptTokens, batch.Usage.PromptTokens, "batch usage %+v; want %d prompt and %d completion tokens", batch.Usage, promptTokens, completionTokens)
	assert.Equal(t, completionTokens, batch.Usage.CompletionTokens, "batch usage %+v; want %d prompt and %d completion tokens", batch.Usage, promptTokens, completionTokens)
	assert.Equal(t, 2+3+3, up.Prompts(), "Prompts()")

	// Errors decode as the SDK's APIError.
	_, err = c.CreateCompletion(ctx, openai.CompletionRequest{Model: "quill-huge", Prompt: "x"})
	var apiErr *openai.APIError
	if assert.True(t, errors.As(err, &apiErr), "unknown model: %v; want an APIError 404 model_not_found", err) {
		assert.Equal(t, http.StatusNotFound, apiErr.HTTPStatusCode, "unknown model: %v; want an APIError 404 model_not_found", err)
		assert.True(t, apiErr.Code == "model_not_found", "unknown model: %v; want an APIError 404 model_not_found", err)
	}
	_, err = sdkClient(t, up, "wrong").CreateCompletion(ctx, openai.CompletionRequest{Model: upstreamtest.ModelSmall, Prompt: "x"})
	if assert.True(t, errors.As(err, &apiErr), "wrong key: %v; want an APIError 401", err) {
		assert.Equal(t, http.StatusUnauthorized, apiErr.HTTPStatusCode, "wrong key: %v; want an APIError 401", err)
	}
	for _, r := range up.Requests() {
		got := r.Header.Get("Authorization")
		assert.False(t, got != "Bearer up-key" && got != "Bearer wrong", "request carried Authorization %q", got)
	}
}

func checkSDKLogprobs(tb testing.TB, text string, lp openai.LogprobResult, k int) {
	tb.Helper()
	assert.Equal(tb, text, strings.Join(lp.Tokens, ""), "tokens %q do not join to %q", lp.Tokens, text)
	off := 0
	for i, tok := range lp.Tokens {
		assert.Equal(tb, off, lp.TextOffset[i], "text_offset[%d] = %d; want %d", i, lp.TextOffset[i], off)
		off += len(tok)
		top := lp.TopLogprobs[i]
		assert.Len(tb, top, k, "top_logprobs[%d] has %d entries; want %d", i, len(top), k)
		best := ""
		for t, v := range top {
			if best == "" || v > top[best] {
				best = t
			}
		}
		assert.False(tb, lp.TokenLogprobs[i] >= 0 || best != tok || top[tok] != lp.TokenLogprobs[i], "token %d %q (%v): most likely top entry %q", i, tok, lp.TokenLogprobs[i], best)
	}
}

func TestSDKCompletionStream(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	c := sdkClient(t, up, "any")
	ctx := context.Background()
	req := openai.CompletionRequest{
		Model: upstreamtest.ModelLarge, Prompt: []string{"Heather", "The mill by the weir"}, MaxTokens: 6,
		Temperature: greedy, N: 2, LogProbs: 3,
	}
	whole, err := c.CreateCompletion(ctx, req)
	require.NoError(t, err)
	req.StreamOptions = &openai.StreamOptions{IncludeUsage: true}
	stream, err := c.CreateCompletionStream(ctx, req)
	require.NoError(t, err)
	defer stream.Close()
	texts := map[int]string{}
	tokens := map[int][]string{}
	finish := map[int]string{}
	var gotUsage *openai.Usage
	for {
		chunk, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err)
		if chunk.Usage != nil {
			gotUsage = chunk.Usage
			continue
		}
		for _, ch := range chunk.Choices {
			texts[ch.Index] += ch.Text
			tokens[ch.Index] = append(tokens[ch.Index], ch.LogProbs.Tokens...)
			if ch.FinishReason != "" {
				finish[ch.Index] = ch.FinishReason
			}
		}
	}
	for _, w := range whole.Choices {
		assert.False(t, texts[w.Index] != w.Text || finish[w.Index] != w.FinishReason || !slices.Equal(tokens[w.Index], w.LogProbs.Tokens), "choice %d streamed %q %q (%s); answered %q %q (%s)", w.Index, texts[w.Index], tokens[w.Index], finish[w.Index], w.Text, w.LogProbs.Tokens, w.FinishReason)
	}
	if assert.NotNil(t, gotUsage, "stream usage %+v; want %+v", gotUsage, whole.Usage) {
		assert.True(t, *gotUsage == *whole.Usage, "stream usage %+v; want %+v", gotUsage, whole.Usage)
	}
}

func TestSDKChat(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	c := sdkClient(t, up, "any")
	msgs := []openai.ChatCompletionMessage{
		{Role: openai.ChatMessageRoleSystem, Content: "You are the cooperative's scribe."},
		{Role: openai.ChatMessageRoleUser, Content: "Which barge carries the amber jars?"},
	}
	resp, err := c.CreateChatCompletion(context.Background(), openai.ChatCompletionRequest{
		Model: upstreamtest.ModelLarge, Messages: msgs, MaxCompletionTokens: 12, Temperature: greedy, LogProbs: true, TopLogProbs: 3, N: 2,
	})
	require.NoError(t, err)
	require.Equal(t, "chat.completion", resp.Object, "object %q with %d choices; want chat.completion with 2", resp.Object, len(resp.Choices))
	require.Len(t, resp.Choices, 2, "object %q with %d choices; want chat.completion with 2", resp.Object, len(resp.Choices))
	total := 0
	for j, ch := range resp.Choices {
		require.Equal(t, j, ch.Index, "choice %d: index %d role %q logprobs %v", j, ch.Index, ch.Message.Role, ch.LogProbs)
		require.Equal(t, openai.ChatMessageRoleAssistant, ch.Message.Role, "choice %d: index %d role %q logprobs %v", j, ch.Index, ch.Message.Role, ch.LogProbs)
		require.NotNil(t, ch.LogProbs, "choice %d: index %d role %q logprobs %v", j, ch.Index, ch.Message.Role, ch.LogProbs)
		joined := ""
		for _, tl := range ch.LogProbs.Content {
			joined += tl.Token
			assert.Equal(t, tl.Token, string(tl.Bytes), "bytes %v do not spell %q", tl.Bytes, tl.Token)
			if assert.Len(t, tl.TopLogProbs, 3, "token %q (%v): top %+v; want 3 entries led by it", tl.Token, tl.LogProb, tl.TopLogProbs) {
				assert.Equal(t, tl.Token, tl.TopLogProbs[0].Token, "token %q (%v): top %+v; want 3 entries led by it", tl.Token, tl.LogProb, tl.TopLogProbs)
				assert.Equal(t, tl.LogProb, tl.TopLogProbs[0].LogProb, "token %q (%v): top %+v; want 3 entries led by it", tl.Token, tl.LogProb, tl.TopLogProbs)
			}
		}
		assert.Equal(t, ch.Message.Content, joined, "tokens join to %q; content %q", joined, ch.Message.Content)
		total += len(ch.LogProbs.Content)
	}
	assert.Equal(t, resp.Choices[1].Message.Content, resp.Choices[0].Message.Content, "greedy choices differ: %q, %q", resp.Choices[0].Message.Content, resp.Choices[1].Message.Content)
	assert.Equal(t, total, resp.Usage.CompletionTokens, "usage %+v; want %d completion tokens", resp.Usage, total)
	assert.Equal(t, resp.Usage.PromptTokens+total, resp.Usage.TotalTokens, "usage %+v; want %d completion tokens", resp.Usage, total)

	stream, err := c.CreateChatCompletionStream(context.Background(), openai.ChatCompletionRequest{
		Model: upstreamtest.ModelLarge, Messages: msgs, MaxCompletionTokens: 12, Temperature: greedy, LogProbs: true, TopLogProbs: 3,
		StreamOptions: &openai.StreamOptions{IncludeUsage: true},
	})
	require.NoError(t, err)
	defer stream.Close()
	var content, role string
	var toks []string
	var fin openai.FinishReason
	var streamUsage *openai.Usage
	for {
		chunk, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err)
		if chunk.Usage != nil {
			streamUsage = chunk.Usage
		}
		for _, ch := range chunk.Choices {
			if ch.Delta.Role != "" {
				role = ch.Delta.Role
			}
			content += ch.Delta.Content
			if ch.Logprobs != nil {
				for _, tl := range ch.Logprobs.Content {
					toks = append(toks, tl.Token)
					assert.Len(t, tl.TopLogprobs, 3, "streamed token %q has %d top entries; want 3", tl.Token, len(tl.TopLogprobs))
				}
			}
			if ch.FinishReason != "" {
				fin = ch.FinishReason
			}
		}
	}
	want := resp.Choices[0]
	assert.Equal(t, "assistant", role, "stream: role %q content %q tokens %q finish %q; want assistant, %q, %q", role, content, toks, fin, want.Message.Content, want.FinishReason)
	assert.Equal(t, want.Message.Content, content, "stream: role %q content %q tokens %q finish %q; want assistant, %q, %q", role, content, toks, fin, want.Message.Content, want.FinishReason)
	assert.Equal(t, content, strings.Join(toks, ""), "stream: role %q content %q tokens %q finish %q; want assistant, %q, %q", role, content, toks, fin, want.Message.Content, want.FinishReason)
	assert.Equal(t, want.FinishReason, fin, "stream: role %q content %q tokens %q finish %q; want assistant, %q, %q", role, content, toks, fin, want.Message.Content, want.FinishReason)
	if assert.NotNil(t, streamUsage, "stream usage %+v; want %d completion tokens", streamUsage, len(want.LogProbs.Content)) {
		assert.Equal(t, len(want.LogProbs.Content), streamUsage.CompletionTokens, "stream usage %+v; want %d completion tokens", streamUsage, len(want.LogProbs.Content))
	}
	got := up.Calls().Chat
	assert.Equal(t, 2, got, "Calls().Chat = %d; want 2", got)
}
