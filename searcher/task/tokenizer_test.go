package task

import (
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
)

// Check values are pieces of the stories260K vocabulary stored in the GGUF
// file (../shared/models/MODEL-SOURCE.md: 512 tokens, "▁" for a space):
// "▁happy", "▁big" and "▁Lily" are single pieces; "harvest" is not.
func TestLocalTokenizer(t *testing.T) {
	tok := localTokenizer(t)
	tests := []struct {
		text string
		want []string
		one  bool
	}{
		{" happy", []string{" happy"}, true},
		{" big", []string{" big"}, true},
		{" Lily", []string{" Lily"}, true},
		{"", nil, false},
	}
	for _, tt := range tests {
		got := tok.Tokens(tt.text)
		assert.Truef(t, slices.Equal(got, tt.want), "Tokens(%q) = %q, want %q", tt.text, got, tt.want)
	}
	// Multi-token and space-less texts: more than one token, or one token
	// that is not the text itself; either way, joined they give the text back.
	for _, text := range []string{" harvest", "big", " repair it", "happy"} {
		got := tok.Tokens(text)
		assert.Falsef(t, len(got) == 1 && got[0] == text, "Tokens(%q) = %q, want it not to be one token", text, got)
		joined := join(got)
		assert.Equal(t, text, joined, "Tokens(%q) joins to %q", text, joined)
	}
}

func join(toks []string) string {
	var s string
	for _, t := range toks {
		s += t
	}
	return s
}

func TestAllowList(t *testing.T) {
	tests := []struct {
		list  AllowList
		token string
		want  bool
	}{
		{AllowList{}, " the", true},
		{AllowList{}, "ing", true},
		{AllowList{}, "", false},
		{AllowList{WordInitial: true}, " the", true},
		{AllowList{WordInitial: true}, "ing", false},
		{AllowList{WordInitial: true}, " ", false},
		{AllowList{LettersOnly: true}, " the", true},
		{AllowList{LettersOnly: true}, "ing", true},
		{AllowList{LettersOnly: true}, " \"", false},
		{AllowList{LettersOnly: true}, ",", false},
		{AllowList{LettersOnly: true}, " é", true},
		{AllowList{Exclude: []string{" big"}}, " big", false},
		{AllowList{Exclude: []string{" big"}}, " bigger", true},
		{AllowList{MinChars: 2}, " a", false},
		{AllowList{MinChars: 2}, " an", true},
		{AllowList{MinChars: 2}, "an", true},
		{AllowList{MinChars: 3}, " é", false},
	}
	for _, tt := range tests {
		got := tt.list.Allowed(tt.token)
		assert.Equal(t, tt.want, got, "%+v.Allowed(%q) = %v, want %v", tt.list, tt.token, got, tt.want)
	}
}

func TestFill(t *testing.T) {
	tests := []struct{ template, input, prompt, want string }{
		{"{input} {prompt} It was", "Ripe pears.", "Note:", "Ripe pears. Note: It was"},
		{"{prompt}\n{input}", "a {prompt} b", "P", "P\na {prompt} b"},
		{"{input}|{input} {prompt}", "x", "", "x|x "},
	}
	for _, tt := range tests {
		got := Fill(tt.template, tt.input, tt.prompt)
		assert.Equal(t, tt.want, got, "Fill(%q, %q, %q) = %q, want %q", tt.template, tt.input, tt.prompt, got, tt.want)
	}
}
