// Package tokenizer implements the llama SentencePiece-style BPE tokenizer
// stored in GGUF metadata: pieces with merge scores, byte-fallback tokens
// <0x00>…<0xFF>, and "▁" (U+2581) standing for a space.
//
// Encoding follows SentencePiece's BPE with a dummy space prefix: spaces
// become "▁", the text is split into one symbol per character (a character
// with no piece falls back to its byte tokens), and the adjacent pair whose
// concatenation is a piece with the highest score is merged, leftmost first
// on ties, until no pair merges. It is written by hand because it must match
// the model's own vocabulary exactly and no Go library among the module's
// dependencies reads this vocabulary format.
package tokenizer

import (
	"container/heap"
	"errors"
	"fmt"
	"strings"
	"unicode/utf8"
)

// ErrInvalid means the vocabulary is inconsistent (mismatched lengths,
// missing byte tokens, out-of-range special ids).
var ErrInvalid = errors.New("tokenizer: invalid vocabulary")

// Token types as numbered in GGUF metadata (tokenizer.ggml.token_type).
const (
	TypeNormal      = 1
	TypeUnknown     = 2
	TypeControl     = 3
	TypeUserDefined = 4
	TypeUnused      = 5
	TypeByte        = 6
)

// spaceMark is the piece character that stands for a space.
const spaceMark = "\u2581"

// Vocab is the raw vocabulary as stored in GGUF metadata.
type Vocab struct {
	// Pieces are the token strings, indexed by id.
	Pieces []string
	// Scores are the merge scores (higher merges first).
	Scores []float32
	// Types are the token types (TypeNormal, TypeByte, …).
	Types []int32
	// BOS, EOS and Unknown are the special token ids.
	BOS, EOS, Unknown int
}

// Tokenizer encodes text to token ids and back. It is immutable and safe
// for concurrent use.
type Tokenizer struct {
	vocab   Vocab
	pieces  map[string]int // mergeable pieces (normal and user-defined)
	byteTok [256]int       // byte value -> token id
	raw     [][]byte       // id -> bytes the token stands for
	display []string       // id -> unique readable string
}

// New builds a tokenizer from a vocabulary. Every byte value must have its
// <0xNN> token.
func New(v Vocab) (*Tokenizer, error) {
	n := len(v.Pieces)
	if n == 0 || len(v.Scores) != n || len(v.Types) != n {
		return nil, fmt.Errorf("%w: %d pieces, %d scores, %d types", ErrInvalid, n, len(v.Scores), len(v.Types))
	}
	for _, id := range []int{v.BOS, v.EOS, v.Unknown} {
		if id < 0 || id >= n {
			return nil, fmt.Errorf("%w: special id %d outside [0, %d)", ErrInvalid, id, n)
		}
	}
	t := &Tokenizer{vocab: v, pieces: make(map[string]int, n), raw: make([][]byte, n), display: make([]string, n)}
	for i := range t.byteTok {
		t.byteTok[i] = -1
	}
	for id, p := range v.Pieces {
		switch v.Types[id] {
		case TypeByte:
			var b byte
			if _, err := fmt.Sscanf(p, "<0x%02X>", &b); err != nil || len(p) != 6 {
				return nil, fmt.Errorf("%w: byte token %d is %q", ErrInvalid, id, p)
			}
			t.byteTok[b] = id
			t.raw[id] = []byte{b}
		case TypeNormal, TypeUserDefined:
			if _, dup := t.pieces[p]; !dup {
				t.pieces[p] = id
			}
			t.raw[id] = []byte(strings.ReplaceAll(p, spaceMark, " "))
		default: // control, unknown, unused: no text
			t.raw[id] = nil
		}
	}
	for b, id := range t.byteTok {
		if id < 0 {
			return nil, fmt.Errorf("%w: no byte token for 0x%02X", ErrInvalid, b)
		}
	}
	// Display strings: the text itself where it is unique and valid UTF-8,
	// else the piece as written in the vocabulary (which is unique), so a
	// map keyed by display string never merges two tokens.
	seen := map[string]bool{}
	for id := range v.Pieces {
		if v.Types[id] != TypeByte && t.raw[id] != nil {
			seen[string(t.raw[id])] = true
		}
	}
	for id, p := range v.Pieces {
		d := string(t.raw[id])
		switch {
		case v.Types[id] == TypeByte:
			if !utf8.Valid(t.raw[id]) || seen[d] {
				d = p
			}
		case t.raw[id] == nil:
			d = p
		}
		t.display[id] = d
	}
	return t, nil
}

// Len returns the vocabulary size.
func (t *Tokenizer) Len() int { return len(t.vocab.Pieces) }

// BOS returns the beginning-of-sequence token id.
func (t *Tokenizer) BOS() int { return t.vocab.BOS }

// EOS returns the end-of-sequence token id.
func (t *Tokenizer) EOS() int { return t.vocab.EOS }

// Bytes returns the bytes token id stands for: the piece with "▁" as a
// space, the byte of a byte token, or nothing for control tokens and ids
// out of range. The slice must not be modified.
func (t *Tokenizer) Bytes(id int) []byte {
	if id < 0 || id >= len(t.raw) {
		return nil
	}
	return t.raw[id]
}

// Display returns a readable string for id, unique across the vocabulary:
// its text, or its vocabulary piece (e.g. "<0xE2>", "</s>") when the text is
// not valid UTF-8, empty, or shared with another token.
func (t *Tokenizer) Display(id int) string {
	if id < 0 || id >= len(t.display) {
		return ""
	}
	return t.display[id]
}

// Type returns the token's type (TypeNormal, TypeByte, …), or 0 for ids
// out of range.
func (t *Tokenizer) Type(id int) int32 {
	if id < 0 || id >= len(t.vocab.Types) {
		return 0
	}
	return t.vocab.Types[id]
}

// Piece returns the token's string as stored in the vocabulary.
func (t *Tokenizer) Piece(id int) string {
	if id < 0 || id >= len(t.vocab.Pieces) {
		return ""
	}
	return t.vocab.Pieces[id]
}

// Encode returns the token ids for text, without BOS. Non-empty text gets
// SentencePiece's dummy space prefix. Bytes that are not valid UTF-8, and a
// literal "▁" (which would otherwise decode as a space), are encoded as byte
// tokens, so Decode(Encode(s)) == s for every string s.
func (t *Tokenizer) Encode(text string) []int {
	if text == "" {
		return nil
	}
	// Symbols: one per character, in a doubly linked list.
	type symbol struct {
		text       string // piece text ("▁" for spaces); "" for byte fallback
		id         int    // token id if the symbol is final (byte fallback) or known
		prev, next int
	}
	syms := make([]symbol, 0, len(text)+1)
	add := func(s string, id int) {
		syms = append(syms, symbol{text: s, id: id, prev: len(syms) - 1, next: len(syms) + 1})
	}
	addText := func(s string) {
		if id, ok := t.pieces[s]; ok {
			add(s, id)
			return
		}
		for i := 0; i < len(s); i++ {
			add("", t.byteTok[s[i]])
		}
	}
	addText(spaceMark)
	for i := 0; i < len(text); {
		r, size := utf8.DecodeRuneInString(text[i:])
		c := text[i : i+size]
		switch {
		case r == ' ':
			addText(spaceMark)
		case (r == utf8.RuneError && size == 1) || c == spaceMark:
			for j := 0; j < size; j++ {
				add("", t.byteTok[c[j]])
			}
		default:
			addText(c)
		}
		i += size
	}
	syms[len(syms)-1].next = -1

	// Candidate merges in a heap ordered by score, then leftmost.
	q := &pairQueue{}
	try := func(l, r int) {
		if l < 0 || r < 0 || syms[l].text == "" || syms[r].text == "" {
			return
		}
		s := syms[l].text + syms[r].text
		if id, ok := t.pieces[s]; ok {
			heap.Push(q, pair{left: l, right: r, score: t.vocab.Scores[id], size: len(s)})
		}
	}
	for i := 0; i+1 < len(syms); i++ {
		try(i, i+1)
	}
	for q.Len() > 0 {
		p := heap.Pop(q).(pair)
		l, r := &syms[p.left], &syms[p.right]
		// Skip stale candidates: a side was merged away or grew since.
		if l.text == "" || r.text == "" || l.next != p.right || len(l.text)+len(r.text) != p.size {
			continue
		}
		l.text += r.text
		l.id = t.pieces[l.text]
		r.text = ""
		r.id = -1
		l.next = r.next
		if r.next >= 0 {
			syms[r.next].prev = p.left
		}
		try(l.prev, p.left)
		try(p.left, l.next)
	}
	var ids []int
	for i := 0; i >= 0; i = syms[i].next {
		ids = append(ids, syms[i].id)
	}
	return ids
}

// Decode returns the text of ids, dropping the dummy space prefix that
// Encode adds (one leading space of a first token that is a "▁" piece).
// Control tokens such as BOS and EOS contribute nothing.
func (t *Tokenizer) Decode(ids []int) string {
	var b strings.Builder
	for i, id := range ids {
		p := t.Bytes(id)
		if i == 0 && len(p) > 0 && p[0] == ' ' && t.vocab.Types[id] != TypeByte {
			p = p[1:]
		}
		b.Write(p)
	}
	return b.String()
}

type pair struct {
	left, right int
	score       float32
	size        int
}

// pairQueue is a max-heap of merge candidates: highest score first, then
// leftmost, matching a left-to-right scan for the best pair.
type pairQueue []pair

func (q pairQueue) Len() int { return len(q) }
func (q pairQueue) Less(i, j int) bool {
	if q[i].score != q[j].score {
		return q[i].score > q[j].score
	}
	return q[i].left < q[j].left
}
func (q pairQueue) Swap(i, j int) { q[i], q[j] = q[j], q[i] }
func (q *pairQueue) Push(x any)   { *q = append(*q, x.(pair)) }
func (q *pairQueue) Pop() any {
	old := *q
	x := old[len(old)-1]
	*q = old[:len(old)-1]
	return x
}
