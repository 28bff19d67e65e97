// Package localmodel runs a small Llama-architecture language model from a
// GGUF file on the CPU, in pure Go, and serves it on the completions wire
// format (POST /v1/completions, POST /v1/chat/completions, GET /v1/models).
//
// The forward pass is the Llama one: RMSNorm, RoPE on adjacent pairs,
// grouped-query attention with a KV cache, a SwiGLU feed-forward block and
// an output head (tied to the embedding when the file says so). Prompts are
// processed as a batch (matrix × matrix), and a prefix cache lets requests
// that share a token prefix skip recomputing it.
//
// Every floating-point result is computed in a fixed order that does not
// depend on how many rows are processed together, so greedy decoding is
// bit-for-bit the same across runs, batch sizes and cache hits.
//
// A Model is immutable after Load and safe for concurrent use; it is also
// meant to be used in-process as a frozen backbone (see Forward,
// OutputHead, Tokenizer).
package localmodel

import (
	"errors"
	"fmt"
	"math"

	"github.com/stintlab/stint/proxy/localmodel/gguf"
	"github.com/stintlab/stint/proxy/localmodel/tokenizer"
)

// ErrUnsupportedModel means the GGUF file is readable but is not a model
// this package can run (another architecture, inconsistent shapes).
var ErrUnsupportedModel = errors.New("localmodel: unsupported model")

// Config is the model's hyperparameters, read from the GGUF metadata.
type Config struct {
	// Dim is the embedding (hidden) size.
	Dim int
	// HiddenDim is the feed-forward inner size.
	HiddenDim int
	// Layers is the number of transformer blocks.
	Layers int
	// Heads and KVHeads are the query and key/value head counts.
	Heads, KVHeads int
	// HeadDim is Dim / Heads.
	HeadDim int
	// VocabSize is the number of tokens.
	VocabSize int
	// ContextLength is the longest sequence (BOS included) the model runs.
	ContextLength int
	// RopeBase is the RoPE frequency base (10000 unless the file says).
	RopeBase float64
	// NormEps is the RMSNorm epsilon.
	NormEps float32
}

// kvDim is the width of one position's keys (or values) in one layer.
func (c Config) kvDim() int { return c.KVHeads * c.HeadDim }

type layer struct {
	attnNorm, ffnNorm []float32
	wq, wk, wv, wo    []float32 // [out][in]
	gate, up, down    []float32 // [out][in]
}

// Model is a loaded model. It is immutable and safe for concurrent use.
type Model struct {
	cfg     Config
	tok     *tokenizer.Tokenizer
	embed   []float32 // [vocab][dim]
	layers  []layer
	outNorm []float32
	output  []float32 // [vocab][dim]
	// ropeCos and ropeSin hold cos/sin of position × frequency,
	// [ContextLength][HeadDim/2].
	ropeCos, ropeSin []float32
}

// Load reads a GGUF model file. Only the llama architecture is supported;
// tensors may be F32, F16 or Q8_0 (dequantized to float32 at load).
func Load(path string) (*Model, error) {
	f, err := gguf.Open(path)
	if err != nil {
		return nil, fmt.Errorf("localmodel: %w", err)
	}
	m, err := FromGGUF(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return m, nil
}

// FromGGUF builds a model from a parsed GGUF file.
func FromGGUF(f *gguf.File) (*Model, error) {
	arch, err := f.String("general.architecture")
	if err != nil {
		return nil, err
	}
	if arch != "llama" {
		return nil, fmt.Errorf("%w: architecture %q (want llama)", ErrUnsupportedModel, arch)
	}
	u := func(key string) (int, error) {
		v, err := f.Uint(key)
		if err != nil {
			return 0, err
		}
		if v > 1<<24 {
			return 0, fmt.Errorf("%w: %s = %d is too large", ErrUnsupportedModel, key, v)
		}
		return int(v), nil
	}
	var cfg Config
	for _, p := range []struct {
		key string
		dst *int
	}{
		{"llama.embedding_length", &cfg.Dim},
		{"llama.feed_forward_length", &cfg.HiddenDim},
		{"llama.block_count", &cfg.Layers},
		{"llama.attention.head_count", &cfg.Heads},
		{"llama.context_length", &cfg.ContextLength},
	} {
		if *p.dst, err = u(p.key); err != nil {
			return nil, err
		}
	}
	cfg.KVHeads = cfg.Heads
	if _, err := f.Value("llama.attention.head_count_kv"); err == nil {
		if cfg.KVHeads, err = u("llama.attention.head_count_kv"); err != nil {
			return nil, err
		}
	}
	cfg.RopeBase = 10000
	if v, err := f.Float("llama.rope.freq_base"); err == nil {
		cfg.RopeBase = v
	}
	eps, err := f.Float("llama.attention.layer_norm_rms_epsilon")
	if err != nil {
		return nil, err
	}
	cfg.NormEps = float32(eps)
	if cfg.Dim == 0 || cfg.Heads == 0 || cfg.KVHeads == 0 || cfg.Layers == 0 || cfg.HiddenDim == 0 || cfg.ContextLength == 0 ||
		cfg.Dim%cfg.Heads != 0 || cfg.Heads%cfg.KVHeads != 0 || (cfg.Dim/cfg.Heads)%2 != 0 {
		return nil, fmt.Errorf("%w: inconsistent shape %+v", ErrUnsupportedModel, cfg)
	}
	cfg.HeadDim = cfg.Dim / cfg.Heads
	if rd, err := f.Uint("llama.rope.dimension_count"); err == nil && int(rd) != cfg.HeadDim {
		return nil, fmt.Errorf("%w: rope dimension %d != head dim %d", ErrUnsupportedModel, rd, cfg.HeadDim)
	}

	tok, err := loadTokenizer(f)
	if err != nil {
		return nil, err
	}
	cfg.VocabSize = tok.Len()
	m := &Model{cfg: cfg, tok: tok}

	tensor := func(name string, dims ...int) ([]float32, error) {
		ti, err := f.Tensor(name)
		if err != nil {
			return nil, err
		}
		if len(ti.Dims) != len(dims) {
			return nil, fmt.Errorf("%w: tensor %s has dims %v, want %v", ErrUnsupportedModel, name, ti.Dims, dims)
		}
		for i, d := range dims {
			if ti.Dims[i] != uint64(d) {
				return nil, fmt.Errorf("%w: tensor %s has dims %v, want %v", ErrUnsupportedModel, name, ti.Dims, dims)
			}
		}
		return f.Float32s(name)
	}
	d, kv, h, v := cfg.Dim, cfg.kvDim(), cfg.HiddenDim, cfg.VocabSize
	if m.embed, err = tensor("token_embd.weight", d, v); err != nil {
		return nil, err
	}
	if m.outNorm, err = tensor("output_norm.weight", d); err != nil {
		return nil, err
	}
	if _, err := f.Tensor("output.weight"); errors.Is(err, gguf.ErrNotFound) {
		m.output = m.embed // tied head
	} else if m.output, err = tensor("output.weight", d, v); err != nil {
		return nil, err
	}
	m.layers = make([]layer, cfg.Layers)
	for i := range m.layers {
		l := &m.layers[i]
		for _, t := range []struct {
			name string
			dst  *[]float32
			dims []int
		}{
			{"attn_norm", &l.attnNorm, []int{d}},
			{"ffn_norm", &l.ffnNorm, []int{d}},
			{"attn_q", &l.wq, []int{d, d}},
			{"attn_k", &l.wk, []int{d, kv}},
			{"attn_v", &l.wv, []int{d, kv}},
			{"attn_output", &l.wo, []int{d, d}},
			{"ffn_gate", &l.gate, []int{d, h}},
			{"ffn_up", &l.up, []int{d, h}},
			{"ffn_down", &l.down, []int{h, d}},
		} {
			if *t.dst, err = tensor(fmt.Sprintf("blk.%d.%s.weight", i, t.name), t.dims...); err != nil {
				return nil, err
			}
		}
	}
	half := cfg.HeadDim / 2
	m.ropeCos = make([]float32, cfg.ContextLength*half)
	m.ropeSin = make([]float32, cfg.ContextLength*half)
	for pos := 0; pos < cfg.ContextLength; pos++ {
		for i := 0; i < half; i++ {
			freq := math.Pow(cfg.RopeBase, -float64(2*i)/float64(cfg.HeadDim))
			a := float64(pos) * freq
			m.ropeCos[pos*half+i] = float32(math.Cos(a))
			m.ropeSin[pos*half+i] = float32(math.Sin(a))
		}
	}
	return m, nil
}

func loadTokenizer(f *gguf.File) (*tokenizer.Tokenizer, error) {
	if s, err := f.String("tokenizer.ggml.model"); err != nil || s != "llama" {
		return nil, fmt.Errorf("%w: tokenizer model %q (want llama): %v", ErrUnsupportedModel, s, err)
	}
	var v tokenizer.Vocab
	var ok bool
	tv, err := f.Value("tokenizer.ggml.tokens")
	if err != nil {
		return nil, err
	}
	if v.Pieces, ok = tv.V.([]string); !ok {
		return nil, fmt.Errorf("%w: tokenizer.ggml.tokens is not a string array", gguf.ErrWrongType)
	}
	sv, err := f.Value("tokenizer.ggml.scores")
	if err != nil {
		return nil, err
	}
	if v.Scores, ok = sv.V.([]float32); !ok {
		return nil, fmt.Errorf("%w: tokenizer.ggml.scores is not a float32 array", gguf.ErrWrongType)
	}
	yv, err := f.Value("tokenizer.ggml.token_type")
	if err != nil {
		return nil, err
	}
	if v.Types, ok = yv.V.([]int32); !ok {
		return nil, fmt.Errorf("%w: tokenizer.ggml.token_type is not an int32 array", gguf.ErrWrongType)
	}
	ids := []struct {
		key string
		dst *int
		def int
	}{
		{"tokenizer.ggml.bos_token_id", &v.BOS, 1},
		{"tokenizer.ggml.eos_token_id", &v.EOS, 2},
		{"tokenizer.ggml.unknown_token_id", &v.Unknown, 0},
	}
	for _, id := range ids {
		*id.dst = id.def
		if x, err := f.Uint(id.key); err == nil {
			if x >= uint64(len(v.Pieces)) {
				return nil, fmt.Errorf("%w: %s = %d", tokenizer.ErrInvalid, id.key, x)
			}
			*id.dst = int(x)
		}
	}
	tok, err := tokenizer.New(v)
	if err != nil {
		return nil, err
	}
	return tok, nil
}

// Config returns the model's hyperparameters.
func (m *Model) Config() Config { return m.cfg }

// VocabSize returns the number of tokens.
func (m *Model) VocabSize() int { return m.cfg.VocabSize }

// EmbeddingSize returns the hidden size (the width of Forward's Hidden rows).
func (m *Model) EmbeddingSize() int { return m.cfg.Dim }

// Tokenizer returns the model's tokenizer (Encode, Decode, BOS, EOS,
// Bytes, Display).
func (m *Model) Tokenizer() *tokenizer.Tokenizer { return m.tok }

// Matrix is a dense row-major float32 matrix.
type Matrix struct {
	// Rows and Cols are the shape.
	Rows, Cols int
	// Data holds Rows*Cols values, row by row.
	Data []float32
}

// Row returns row i as a slice of Data.
func (x Matrix) Row(i int) []float32 { return x.Data[i*x.Cols : (i+1)*x.Cols] }

// OutputHead returns the output-head weights, VocabSize rows of
// EmbeddingSize: logits = OutputHead · hidden. The matrix shares the
// model's memory and must not be modified.
func (m *Model) OutputHead() Matrix {
	return Matrix{Rows: m.cfg.VocabSize, Cols: m.cfg.Dim, Data: m.output}
}
