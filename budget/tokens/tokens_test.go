package tokens_test

import (
	"errors"
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/tiktoken-go/tokenizer"

	"github.com/stintlab/stint/budget/tokens"
)

func newCounter(tb testing.TB) *tokens.Counter {
	tb.Helper()
	c, err := tokens.New(map[string]tokens.Encoding{
		"m-cl": tokens.Cl100kBase, "m-o2": tokens.O200kBase, "m-r5": tokens.R50kBase,
	})
	if err != nil {
		tb.Fatalf("New: %v", err)
	}
	return c
}

// TestCheckValues compares with token ids published outside this project.
func TestCheckValues(t *testing.T) {
	tests := []struct {
		model  string
		enc    tokens.Encoding
		text   string
		want   []uint
		source string
	}{
		// From memory; the same ids appear in tiktoken-go/tokenizer
		// v0.10.0's tokenizer_test.go.
		{"m-cl", tokens.Cl100kBase, "hello world", []uint{15339, 1917}, "cl100k_base 'hello world' (from memory)"},
		// From memory: OpenAI Cookbook, "How to count tokens with tiktoken".
		{"m-cl", tokens.Cl100kBase, "tiktoken is great!", []uint{83, 1609, 5963, 374, 2294, 0}, "OpenAI Cookbook example (from memory)"},
		// From memory: GPT-2's vocabulary, "hello" = 31373, " world" = 995.
		{"m-r5", tokens.R50kBase, "hello world", []uint{31373, 995}, "GPT-2 vocabulary (from memory)"},
		// tiktoken-go/tokenizer v0.10.0 tokenizer_test.go (the library's own
		// test, so not independent of it).
		{"m-o2", tokens.O200kBase, "hello world", []uint{24912, 2375}, "tiktoken-go/tokenizer test"},
	}
	c := newCounter(t)
	for _, tt := range tests {
		t.Run(fmt.Sprintf("%s/%s", tt.enc, tt.text), func(t *testing.T) {
			codec, err := tokenizer.Get(tokenizer.Encoding(tt.enc))
			if err != nil {
				t.Fatal(err)
			}
			ids, _, err := codec.Encode(tt.text)
			if err != nil || !slices.Equal(ids, tt.want) {
				t.Errorf("%s: Encode(%q) = %v, %v; want %v", tt.source, tt.text, ids, err, tt.want)
			}
			got, err := c.Text(tt.model, tt.text)
			if want := (tokens.Count{Tokens: int64(len(tt.want)), Encoding: tt.enc}); err != nil || got != want {
				t.Errorf("Text(%s, %q) = %+v, %v; want %+v", tt.model, tt.text, got, err, want)
			}
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
		if err != nil || got != tt.want {
			t.Errorf("Prompt(%s, %q) = %+v, %v; want %+v", tt.model, tt.prompts, got, err, tt.want)
		}
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
		if err != nil {
			t.Fatal(err)
		}
		return n.Tokens
	}
	for _, model := range []string{"m-cl", "m-o2", "mystery"} {
		got, err := c.Chat(model, msgs)
		if err != nil {
			t.Fatalf("Chat(%s): %v", model, err)
		}
		var body int64
		for _, m := range msgs {
			body += text(model, m.Role) + text(model, m.Content)
			if m.Name != "" {
				body += text(model, m.Name)
			}
		}
		want := body + 2*tokens.MessageOverhead + tokens.NameOverhead + tokens.ReplyOverhead
		if got.Tokens != want {
			t.Errorf("Chat(%s) = %d tokens, want %d", model, got.Tokens, want)
		}
		// The cookbook recipe (from memory: 3 per message, 1 per name,
		// 3 for the reply, role and content counted) gives no more.
		if cookbook := body + 2*3 + 1 + 3; got.Tokens < cookbook {
			t.Errorf("Chat(%s) = %d, below the cookbook recipe's %d", model, got.Tokens, cookbook)
		}
	}
	// Pin the whole cl100k figure with counts taken from the codec itself.
	codec, _ := tokenizer.Get(tokenizer.Cl100kBase)
	var body int
	for _, s := range []string{"system", "You answer in one line.", "user", "quill", "hello world"} {
		n, _ := codec.Count(s)
		body += n
	}
	got, _ := c.Chat("m-cl", msgs)
	if want := int64(body + 4 + 4 + 1 + 3); got.Tokens != want {
		t.Errorf("Chat(m-cl) = %d, want %d", got.Tokens, want)
	}
}

func TestNewRejectsUnknownEncoding(t *testing.T) {
	_, err := tokens.New(map[string]tokens.Encoding{"good": tokens.Cl100kBase, "bad-model": "p51k_base"})
	if !errors.Is(err, tokens.ErrUnknownEncoding) {
		t.Fatalf("New error = %v, want ErrUnknownEncoding", err)
	}
	if want := `model "bad-model"`; !strings.Contains(err.Error(), want) {
		t.Errorf("error %q does not name %s", err, want)
	}
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
		if err != nil {
			f.Fatal(err)
		}
		codecs[e] = c
	}
	f.Fuzz(func(t *testing.T, s string) {
		for e, c := range codecs {
			n, err := c.Count(s)
			if err != nil {
				t.Fatalf("%s Count(%q): %v", e, s, err)
			}
			if int64(n) > tokens.UpperBound(s) {
				t.Errorf("%s: %q has %d tokens, above its %d bytes", e, s, n, tokens.UpperBound(s))
			}
		}
	})
}
