package tokens_test

import (
	"fmt"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"github.com/tiktoken-go/tokenizer"

	"github.com/stintlab/stint/budget/tokens"
)

func newCounter(tb testing.TB) *tokens.Counter {
	tb.Helper()
	c, err := tokens.New(map[string]tokens.Encoding{
		"m-cl": tokens.Cl100kBase, "m-o2": tokens.O200kBase, "m-r5": tokens.R50kBase,
	})
	require.NoError(tb, err, "New")
	return c
}

// cookbook is OpenAI's notebook "How to count tokens with tiktoken"
// (openai/openai-cookbook, examples/How_to_count_tokens_with_tiktoken.ipynb,
// as of commit 06d9feb5e21e6fdc85f3ddce7731e05892758cd7), the source of the
// check values marked with it: the outputs of its cells.
const cookbook = "OpenAI cookbook, How to count tokens with tiktoken"

// TestCheckValues compares with token ids published outside this project.
func TestCheckValues(t *testing.T) {
	tests := []struct {
		model  string
		enc    tokens.Encoding
		text   string
		want   []uint
		source string
	}{
		{"m-cl", tokens.Cl100kBase, "tiktoken is great!", []uint{83, 1609, 5963, 374, 2294, 0}, cookbook + ", section 3"},
		{"m-cl", tokens.Cl100kBase, "antidisestablishmentarianism", []uint{519, 85342, 34500, 479, 8997, 2191}, cookbook + ", section 5"},
		{"m-cl", tokens.Cl100kBase, "2 + 2 = 4", []uint{17, 489, 220, 17, 284, 220, 19}, cookbook + ", section 5"},
		{"m-cl", tokens.Cl100kBase, "お誕生日おめでとう", []uint{33334, 45918, 243, 21990, 9080, 33334, 62004, 16556, 78699}, cookbook + ", section 5"},
		// r50k_base is the notebook's "gpt2".
		{"m-r5", tokens.R50kBase, "antidisestablishmentarianism", []uint{415, 29207, 44390, 3699, 1042}, cookbook + ", section 5 (gpt2)"},
		{"m-r5", tokens.R50kBase, "2 + 2 = 4", []uint{17, 1343, 362, 796, 604}, cookbook + ", section 5 (gpt2)"},
		// tiktoken-go/tokenizer v0.10.0 tokenizer_test.go (the library's own
		// test, so not independent of it; no outside o200k_base ids are at
		// hand here).
		{"m-cl", tokens.Cl100kBase, "hello world", []uint{15339, 1917}, "tiktoken-go/tokenizer test"},
		{"m-o2", tokens.O200kBase, "hello world", []uint{24912, 2375}, "tiktoken-go/tokenizer test"},
	}
	c := newCounter(t)
	for _, tt := range tests {
		t.Run(fmt.Sprintf("%s/%s", tt.enc, tt.text), func(t *testing.T) {
			codec, err := tokenizer.Get(tokenizer.Encoding(tt.enc))
			require.NoError(t, err)
			ids, _, err := codec.Encode(tt.text)
			require.NoError(t, err)
			assert.Equal(t, tt.want, ids, "%s: Encode(%q)", tt.source, tt.text)
			got, err := c.Text(tt.model, tt.text)
			require.NoError(t, err)
			assert.Equal(t, tokens.Count{Tokens: int64(len(tt.want)), Encoding: tt.enc}, got, "Text(%s, %q)", tt.model, tt.text)
		})
	}
}

func TestPrompt(t *testing.T) {
	c := newCounter(t)
	tests := []struct {
		model   string
		prompts []string
		want    tokens.Count
	}{
		{"m-cl", []string{"hello world"}, tokens.Count{Tokens: 2, Encoding: tokens.Cl100kBase}},
		{"m-cl", []string{"hello world", "tiktoken is great!"}, tokens.Count{Tokens: 8, Encoding: tokens.Cl100kBase}},
		{"m-cl", nil, tokens.Count{Tokens: 0, Encoding: tokens.Cl100kBase}},
		// Unknown model: bytes plus BoundOverhead per prompt.
		{"mystery", []string{"hello world", "héllo"}, tokens.Count{Tokens: 11 + 1 + 6 + 1}},
		{"mystery", []string{""}, tokens.Count{Tokens: 1}},
	}
	for _, tt := range tests {
		got, err := c.Prompt(tt.model, tt.prompts...)
		require.NoError(t, err, "Prompt(%s, %q)", tt.model, tt.prompts)
		assert.Equal(t, tt.want, got, "Prompt(%s, %q)", tt.model, tt.prompts)
	}
}

func TestChat(t *testing.T) {
	c := newCounter(t)
	msgs := []tokens.Message{
		{Role: "system", Content: "You answer in one line."},
		{Role: "user", Name: "quill", Content: "hello world"},
	}
	text := func(model, s string) int64 {
		n, err := c.Text(model, s)
		require.NoError(t, err)
		return n.Tokens
	}
	for _, model := range []string{"m-cl", "m-o2", "mystery"} {
		got, err := c.Chat(model, msgs)
		require.NoError(t, err, "Chat(%s)", model)
		var body int64
		for _, m := range msgs {
			body += text(model, m.Role) + text(model, m.Content)
			if m.Name != "" {
				body += text(model, m.Name)
			}
		}
		want := body + 2*tokens.MessageOverhead + tokens.NameOverhead + tokens.ReplyOverhead
		assert.Equal(t, want, got.Tokens, "Chat(%s)", model)
	}
	// Pin the whole cl100k figure with counts taken from the codec itself.
	codec, err := tokenizer.Get(tokenizer.Cl100kBase)
	require.NoError(t, err)
	var body int
	for _, s := range []string{"system", "You answer in one line.", "user", "quill", "hello world"} {
		n, err := codec.Count(s)
		require.NoError(t, err)
		body += n
	}
	got, err := c.Chat("m-cl", msgs)
	require.NoError(t, err)
	assert.Equal(t, int64(body+4+4+1+3), got.Tokens, "Chat(m-cl)")
}

// TestChatCookbookExample counts the notebook's example conversation (its
// section 6), whose prompt tokens the API itself counted: 129 for
// gpt-3.5-turbo-0613, gpt-4-0314 and gpt-4-0613, 127 for
// gpt-3.5-turbo-0301, all cl100k_base. Chat never counts fewer, and counts
// at most one token per message more (MessageOverhead is 4 where those
// models use 3).
func TestChatCookbookExample(t *testing.T) {
	msgs := []tokens.Message{
		{Role: "system", Content: "You are a helpful, pattern-following assistant that translates corporate jargon into plain English."},
		{Role: "system", Name: "example_user", Content: "New synergies will help drive top-line growth."},
		{Role: "system", Name: "example_assistant", Content: "Things working well together will increase revenue."},
		{Role: "system", Name: "example_user", Content: "Let's circle back when we have more bandwidth to touch base on opportunities for increased leverage."},
		{Role: "system", Name: "example_assistant", Content: "Let's talk later when we're less busy about how to do better."},
		{Role: "user", Content: "This late pivot means we don't have time to boil the ocean for the client deliverable."},
	}
	const apiMost, apiLeast = 129, 127 // cookbook, section 6: "prompt tokens counted by the OpenAI API"
	got, err := newCounter(t).Chat("m-cl", msgs)
	require.NoError(t, err)
	assert.GreaterOrEqual(t, got.Tokens, int64(apiMost), "Chat undercounts the API's count (%s)", cookbook)
	assert.GreaterOrEqual(t, got.Tokens, int64(apiLeast), "Chat undercounts the API's count (%s)", cookbook)
	assert.LessOrEqual(t, got.Tokens, int64(apiMost+len(msgs)), "Chat counts more than one token per message above the API's count")
}

func TestNewRejectsUnknownEncoding(t *testing.T) {
	_, err := tokens.New(map[string]tokens.Encoding{"good": tokens.Cl100kBase, "bad-model": "p51k_base"})
	require.ErrorIs(t, err, tokens.ErrUnknownEncoding)
	assert.Contains(t, err.Error(), `model "bad-model"`, "the error names the model")
}

// FuzzUpperBound checks the argument in UpperBound's doc on real
// encoders: no encoding yields more tokens than the text has bytes.
func FuzzUpperBound(f *testing.F) {
	for _, s := range []string{
		"", "hello world", "tiktoken is great!", "héllo wörld", "日本語のテキスト", "🙂🙃🧪",
		"<|endoftext|>", "\xff\xfe\xfd", "    \n\n\t  ", "1234567890123", "a\u0301\u0302",
	} {
		f.Add(s)
	}
	codecs := map[tokens.Encoding]tokenizer.Codec{}
	for _, e := range []tokens.Encoding{tokens.Cl100kBase, tokens.O200kBase, tokens.R50kBase} {
		c, err := tokenizer.Get(tokenizer.Encoding(e))
		require.NoError(f, err)
		codecs[e] = c
	}
	f.Fuzz(func(t *testing.T, s string) {
		for e, c := range codecs {
			n, err := c.Count(s)
			require.NoError(t, err, "%s Count(%q)", e, s)
			assert.LessOrEqual(t, int64(n), tokens.UpperBound(s), "%s: %q has more tokens than bytes", e, s)
		}
	})
}
