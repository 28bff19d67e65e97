package tokenizer

import (
	"fmt"
	"math/rand/v2"
	"strings"
	"testing"
	"unicode/utf8"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/gguf"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
)

// modelPath finds the real model file (see modeltest).
func modelPath(tb testing.TB) string {
	tb.Helper()
	return modeltest.Path(tb)
}

func realTokenizer(tb testing.TB) *Tokenizer {
	tb.Helper()
	f, err := gguf.Open(modelPath(tb))
	require.NoError(tb, err)
	get := func(k string) gguf.Value {
		v, err := f.Value(k)
		require.NoError(tb, err)
		return v
	}
	tok, err := New(Vocab{
		Pieces: get("tokenizer.ggml.tokens").V.([]string),
		Scores: get("tokenizer.ggml.scores").V.([]float32),
		Types:  get("tokenizer.ggml.token_type").V.([]int32),
		BOS:    1, EOS: 2, Unknown: 0,
	})
	require.NoError(tb, err)
	return tok
}

// handVocab is a tiny vocabulary whose BPE results are worked out by hand.
func handVocab(tb testing.TB, extra map[string]float32) *Tokenizer {
	tb.Helper()
	v := Vocab{Pieces: []string{"<unk>", "<s>", "</s>"}, Types: []int32{2, 3, 3}, Scores: []float32{0, 0, 0}, BOS: 1, EOS: 2}
	for b := 0; b < 256; b++ {
		v.Pieces = append(v.Pieces, fmt.Sprintf("<0x%02X>", b))
		v.Types = append(v.Types, TypeByte)
		v.Scores = append(v.Scores, 0)
	}
	for _, p := range []string{"▁", "a", "b", "c"} {
		v.Pieces = append(v.Pieces, p)
		v.Types = append(v.Types, TypeNormal)
		v.Scores = append(v.Scores, -100)
	}
	for p, s := range extra {
		v.Pieces = append(v.Pieces, p)
		v.Types = append(v.Types, TypeNormal)
		v.Scores = append(v.Scores, s)
	}
	tok, err := New(v)
	require.NoError(tb, err)
	return tok
}

func pieces(t *Tokenizer, ids []int) []string {
	out := make([]string, len(ids))
	for i, id := range ids {
		out[i] = t.Piece(id)
	}
	return out
}

func TestEncodeHandVocab(t *testing.T) {
	tests := []struct {
		name  string
		extra map[string]float32
		in    string
		want  string
	}{
		// "▁abc": ab (score 0) beats bc (-1) and ▁a (-2); then ▁+ab is
		// not a piece, ab+c = abc (-3) merges.
		{"best score first", map[string]float32{"ab": 0, "bc": -1, "▁a": -2, "abc": -3}, "abc", "▁|abc"},
		// Equal scores: symbols ▁,a,a,a; both a+a pairs score 0, the
		// leftmost merges first, leaving ▁,aa,a.
		{"leftmost on ties", map[string]float32{"aa": 0}, "aaa", "▁|aa|a"},
		{"space becomes mark", map[string]float32{"▁a": 0}, "a a", "▁a|▁a"},
		{"unknown char falls back to bytes", nil, "é", "▁|<0xC3>|<0xA9>"},
		{"literal mark is bytes", nil, "▁", "▁|<0xE2>|<0x96>|<0x81>"},
		{"invalid utf8 is bytes", nil, "a\xff", "▁|a|<0xFF>"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tok := handVocab(t, tc.extra)
			ids := tok.Encode(tc.in)
			got := strings.Join(pieces(tok, ids), "|")
			assert.Equal(t, tc.want, got, "Encode(%q): got %s, want %s", tc.in, got, tc.want)
			got = tok.Decode(ids)
			assert.Equal(t, tc.in, got, "Decode: got %q, want %q", got, tc.in)
		})
	}
}

func TestEncodeRealVocab(t *testing.T) {
	tok := realTokenizer(t)
	got := tok.Encode("")
	assert.Len(t, got, 0, "Encode(\"\"): got %v, want none", got)
	// The opening words of the model's published greedy output (llama2.c
	// doc/stories260K.md, via MODEL-SOURCE.md) are whole pieces of this
	// vocabulary, so BPE must reach them.
	ids := tok.Encode("Once upon a time")
	assert.Equal(t, "▁Once|▁upon|▁a|▁time", strings.Join(pieces(tok, ids), "|"))
}

// TestByteTokensCoverEveryByte checks each byte value has a token that
// decodes to exactly that byte, and a lone invalid byte encodes through it.
func TestByteTokensCoverEveryByte(t *testing.T) {
	tok := realTokenizer(t)
	for b := 0; b < 256; b++ {
		id := tok.byteTok[b]
		got := tok.Bytes(id)
		if assert.Len(t, got, 1, "byte 0x%02X: token %d gives %q", b, id, got) {
			assert.Equal(t, byte(b), got[0], "byte 0x%02X: token %d gives %q", b, id, got)
		}
		s := string([]byte{'x', byte(b)})
		assert.Equal(t, s, tok.Decode(tok.Encode(s)), "round trip of %q", s)
	}
}

func TestDisplayUnique(t *testing.T) {
	tok := realTokenizer(t)
	seen := map[string]int{}
	for id := 0; id < tok.Len(); id++ {
		d := tok.Display(id)
		prev, dup := seen[d]
		assert.False(t, dup, "display %q shared by %d and %d", d, prev, id)
		seen[d] = id
		assert.True(t, utf8.ValidString(d), "display of %d is %q", id, d)
		assert.NotEqual(t, "", d, "display of %d is %q", id, d)
	}
	got := tok.Display(tok.pieces["e"])
	assert.Equal(t, "e", got, "display of e: got %q", got)
}

// randomText mixes ASCII, spaces, the "▁" mark, multi-byte runes and
// (when raw) invalid bytes.
func randomText(rng *rand.Rand, raw bool) string {
	var b strings.Builder
	for range rng.IntN(40) {
		switch rng.IntN(7) {
		case 0:
			b.WriteByte(' ')
		case 1:
			b.WriteString("▁")
		case 2:
			b.WriteRune(rune(0x80 + rng.IntN(0x800)))
		case 3:
			b.WriteRune(rune(0x10000 + rng.IntN(0x10000)))
		case 4:
			if raw {
				b.WriteByte(byte(rng.Uint32()))
			}
		default:
			b.WriteByte(byte('!' + rng.IntN(94)))
		}
	}
	return b.String()
}

// TestRoundTripProperty: Decode(Encode(s)) == s on random strings.
func TestRoundTripProperty(t *testing.T) {
	tok := realTokenizer(t)
	rng := rand.New(rand.NewPCG(7, 8))
	for i := range 3000 {
		s := randomText(rng, i%2 == 1)
		ids := tok.Encode(s)
		got := tok.Decode(ids)
		require.Equal(t, s, got, "round trip: got %q, want %q (ids %v)", got, s, ids)
		for _, id := range ids {
			require.GreaterOrEqual(t, id, 0, "Encode(%q) gave id %d", s, id)
			require.Less(t, id, tok.Len(), "Encode(%q) gave id %d", s, id)
			require.NotEqual(t, tok.BOS(), id, "Encode(%q) gave id %d", s, id)
			require.NotEqual(t, tok.EOS(), id, "Encode(%q) gave id %d", s, id)
		}
	}
}

func FuzzRoundTrip(f *testing.F) {
	tok := realTokenizer(f)
	for _, s := range []string{"", " ", "  a", "Once upon a time", "▁▁", "é\xff\x00", "日本語 text\n"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		got := tok.Decode(tok.Encode(s))
		assert.Equal(t, s, got, "got %q, want %q", got, s)
	})
}

func TestNewErrors(t *testing.T) {
	tests := []struct {
		name string
		v    Vocab
	}{
		{"empty", Vocab{}},
		{"length mismatch", Vocab{Pieces: []string{"a"}, Scores: []float32{0, 0}, Types: []int32{1}}},
		{"no byte tokens", Vocab{Pieces: []string{"a"}, Scores: []float32{0}, Types: []int32{1}}},
		{"bad byte token", Vocab{Pieces: []string{"<0xZZ>"}, Scores: []float32{0}, Types: []int32{TypeByte}}},
		{"bos out of range", Vocab{Pieces: []string{"a"}, Scores: []float32{0}, Types: []int32{1}, BOS: 5}},
	}
	for _, tc := range tests {
		_, err := New(tc.v)
		assert.ErrorIs(t, err, ErrInvalid, "%s: got %v, want ErrInvalid", tc.name, err)
	}
}
