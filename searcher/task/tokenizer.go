package task

import "github.com/stintlab/stint/proxy/localmodel/tokenizer"

// Tokenizer splits text into the target model's tokens, as a continuation of
// other text (no beginning-of-text marker, no dummy prefix), each token
// named as the API names it in log-probabilities. A verbalizer is valid
// when Tokens returns exactly one token equal to the verbalizer itself.
type Tokenizer interface {
	Tokens(text string) []string
}

// LocalTokenizer adapts the local model's tokenizer
// (proxy/localmodel/tokenizer) to Tokenizer; tokens are named by
// tokenizer.Display, as the local model's server names them.
type LocalTokenizer struct {
	tok *tokenizer.Tokenizer
}

var _ Tokenizer = LocalTokenizer{}

// NewLocalTokenizer wraps tok.
func NewLocalTokenizer(tok *tokenizer.Tokenizer) LocalTokenizer { return LocalTokenizer{tok: tok} }

// Tokens encodes text as it would be tokenized after other text.
// tokenizer.Encode adds SentencePiece's dummy space in front and may merge
// it into the first word, which a continuation never has; so text is
// encoded behind a NUL byte, which has no piece of its own (byte fallback)
// and therefore merges with nothing, and the tokens up to and including the
// NUL are dropped.
func (l LocalTokenizer) Tokens(text string) []string {
	if text == "" {
		return nil
	}
	ids := l.tok.Encode("\x00" + text)
	for i, id := range ids {
		if l.tok.Type(id) == tokenizer.TypeByte && len(l.tok.Bytes(id)) == 1 && l.tok.Bytes(id)[0] == 0 {
			ids = ids[i+1:]
			break
		}
	}
	out := make([]string, len(ids))
	for i, id := range ids {
		out[i] = l.tok.Display(id)
	}
	return out
}
