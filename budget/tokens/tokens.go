// Package tokens counts prompt tokens before an upstream call, so the
// ledger can reserve the worst-case cost.
//
// Models are mapped to tiktoken encodings (cl100k_base, o200k_base,
// r50k_base) by configuration; the counting itself is done by
// github.com/tiktoken-go/tokenizer with its offline tables. A model without
// a known encoding is counted with UpperBound, which never undercounts a
// byte-level BPE tokenizer.
//
// Every count is an estimate of what the provider will bill: chat templates
// add tokens the client never sent, and providers do not publish all of
// them; the overheads added here are chosen to err on the high side.
package tokens

import (
	"errors"
	"fmt"
	"sort"

	"github.com/tiktoken-go/tokenizer"
)

// Encoding names a tiktoken encoding.
type Encoding string

// The encodings a model can be mapped to.
const (
	Cl100kBase Encoding = "cl100k_base"
	O200kBase  Encoding = "o200k_base"
	R50kBase   Encoding = "r50k_base"
)

// Per-message overheads added by Chat. They are the largest values in the
// message-counting recipe of OpenAI's cookbook notebook "How to count
// tokens with tiktoken" (openai/openai-cookbook,
// examples/How_to_count_tokens_with_tiktoken.ipynb): each message costs 3
// tokens besides its text in gpt-3.5-turbo-0613 and gpt-4 (4 in
// gpt-3.5-turbo-0301, so 4 is used), a name costs 1 more, and every reply
// is primed with <|start|>assistant<|message|>, 3 tokens. Using the maxima
// makes the count conservative for every variant of the recipe: on the
// notebook's example conversation, whose prompt tokens the API counted as
// 129 (127 for gpt-3.5-turbo-0301), Chat counts at least that and at most
// one token per message more (TestChatCookbookExample).
const (
	MessageOverhead = 4 // tokens per message besides its text
	NameOverhead    = 1 // extra tokens for a message with a name
	ReplyOverhead   = 3 // tokens priming the reply, once per request
)

// BoundOverhead is added once per prompt or message when counting with
// UpperBound, for a begin-of-text or leading-marker token that tokenizers
// other than byte-level BPE may prepend.
const BoundOverhead = 1

// ErrUnknownEncoding reports a model mapped to an encoding this package
// does not have.
var ErrUnknownEncoding = errors.New("tokens: unknown encoding (want cl100k_base, o200k_base or r50k_base)")

// Message is the text of one chat message. The proxy flattens content parts
// to their text before counting; non-text parts (images, tool schemas) must
// be estimated separately.
type Message struct {
	Role    string // "system", "user", "assistant", …
	Name    string // empty if the message has none
	Content string // the text
}

// Count is a token count.
type Count struct {
	// Tokens is the count: exact for the text of a prompt with a known
	// encoding, an upper bound otherwise.
	Tokens int64
	// Encoding is the encoding used, or "" if UpperBound was used.
	Encoding Encoding
}

// Counter counts tokens per model. It is safe for concurrent use.
type Counter struct {
	models map[string]Encoding
	codecs map[Encoding]tokenizer.Codec
}

// New returns a Counter for the given model → encoding map (model names as
// clients send them). It loads the tables of the encodings used, and
// rejects an unknown encoding with an error naming the model.
func New(models map[string]Encoding) (*Counter, error) {
	c := &Counter{models: map[string]Encoding{}, codecs: map[Encoding]tokenizer.Codec{}}
	names := make([]string, 0, len(models))
	for m := range models {
		names = append(names, m)
	}
	sort.Strings(names)
	for _, m := range names {
		enc := models[m]
		switch enc {
		case Cl100kBase, O200kBase, R50kBase:
		default:
			return nil, fmt.Errorf("model %q: %w: %q", m, ErrUnknownEncoding, string(enc))
		}
		if c.codecs[enc] == nil {
			codec, err := tokenizer.Get(tokenizer.Encoding(enc))
			if err != nil {
				return nil, fmt.Errorf("model %q: encoding %s: %w", m, enc, err)
			}
			c.codecs[enc] = codec
		}
		c.models[m] = enc
	}
	return c, nil
}

// Encoding returns the encoding model is mapped to, if any.
func (c *Counter) Encoding(model string) (Encoding, bool) {
	e, ok := c.models[model]
	return e, ok
}

// Text counts the tokens of s for model.
func (c *Counter) Text(model, s string) (Count, error) {
	enc, ok := c.models[model]
	if !ok {
		return Count{Tokens: UpperBound(s) + BoundOverhead}, nil
	}
	n, err := c.codecs[enc].Count(s)
	if err != nil {
		return Count{}, fmt.Errorf("tokens: count for model %q: %w", model, err)
	}
	return Count{Tokens: int64(n), Encoding: enc}, nil
}

// Prompt counts a completions prompt, given as one string or as the items
// of an array of strings: the sum of the items' counts. (A prompt given as
// token ids counts as the number of ids; the caller does that.)
func (c *Counter) Prompt(model string, prompts ...string) (Count, error) {
	var total Count
	for _, p := range prompts {
		n, err := c.Text(model, p)
		if err != nil {
			return Count{}, err
		}
		total.Tokens += n.Tokens
		total.Encoding = n.Encoding
	}
	if len(prompts) == 0 {
		total.Encoding, _ = c.Encoding(model)
	}
	return total, nil
}

// Chat counts the prompt tokens of a chat request: for each message the
// tokens of its role, name and content plus MessageOverhead (and
// NameOverhead with a name), then ReplyOverhead once. The result is an
// estimate that errs high for the recipe it follows; other providers'
// templates may differ.
func (c *Counter) Chat(model string, msgs []Message) (Count, error) {
	total := Count{Tokens: ReplyOverhead}
	total.Encoding, _ = c.Encoding(model)
	for _, m := range msgs {
		total.Tokens += MessageOverhead
		parts := []string{m.Role, m.Content}
		if m.Name != "" {
			total.Tokens += NameOverhead
			parts = append(parts, m.Name)
		}
		for _, p := range parts {
			n, err := c.Text(model, p)
			if err != nil {
				return Count{}, err
			}
			total.Tokens += n.Tokens
		}
	}
	return total, nil
}

// UpperBound returns the UTF-8 byte length of s, which no byte-level BPE
// tokenizer can exceed.
//
// Why: a byte-level BPE tokenizer (GPT-2's r50k_base, cl100k_base,
// o200k_base and their kin) first splits the text into non-empty pieces
// that together cover every byte exactly once, then encodes each piece
// starting from one token per byte (its base vocabulary holds all 256 byte
// values, so no byte ever needs more than one token) and repeatedly merges
// two adjacent tokens into one. A merge lowers the count by one and nothing
// raises it, so a piece of k bytes ends as at most k tokens, and the pieces
// together as at most len(s). A special token such as "<|endoftext|>"
// stands for several bytes and so lowers the count further.
//
// Tokenizers of other families (SentencePiece with byte fallback, for one)
// also spend at most one token per byte but may prepend a marker or
// begin-of-text token; Text adds BoundOverhead per text for that.
func UpperBound(s string) int64 { return int64(len(s)) }
