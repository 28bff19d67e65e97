package gguf

import (
	"bytes"
	"encoding/binary"
	"math"
	"math/rand/v2"
	"os"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/modeltest"
)

// modelPath finds the real model file (see modeltest).
func modelPath(tb testing.TB) string {
	tb.Helper()
	return modeltest.Path(tb)
}

// smallFile builds a small valid GGUF file covering every metadata type.
func smallFile(tb testing.TB) []byte {
	tb.Helper()
	meta := []KeyValue{
		{"general.architecture", Value{Type: TypeString, V: "llama"}},
		{"u8", Value{Type: TypeUint8, V: uint8(7)}},
		{"i8", Value{Type: TypeInt8, V: int8(-7)}},
		{"u16", Value{Type: TypeUint16, V: uint16(700)}},
		{"i16", Value{Type: TypeInt16, V: int16(-700)}},
		{"u32", Value{Type: TypeUint32, V: uint32(70000)}},
		{"i32", Value{Type: TypeInt32, V: int32(-70000)}},
		{"f32", Value{Type: TypeFloat32, V: float32(1.5)}},
		{"b", Value{Type: TypeBool, V: true}},
		{"u64", Value{Type: TypeUint64, V: uint64(1 << 40)}},
		{"i64", Value{Type: TypeInt64, V: int64(-1 << 40)}},
		{"f64", Value{Type: TypeFloat64, V: 2.25}},
		{"strs", Value{Type: TypeArray, Elem: TypeString, V: []string{"a", "bc", ""}}},
		{"scores", Value{Type: TypeArray, Elem: TypeFloat32, V: []float32{0, -1, -2}}},
		{"types", Value{Type: TypeArray, Elem: TypeInt32, V: []int32{1, 2, 3}}},
	}
	b, err := Encode(meta, []F32Tensor{
		{Name: "a", Dims: []uint64{3, 2}, Data: []float32{1, 2, 3, 4, 5, 6}},
		{Name: "b", Dims: []uint64{1}, Data: []float32{-1}},
	})
	require.NoError(tb, err)
	return b
}

func TestParseSmallFile(t *testing.T) {
	f, err := Parse(smallFile(t))
	require.NoError(t, err)
	got, want := len(f.Keys), 15
	assert.Equal(t, want, got, "keys: got %d, want %d", got, want)
	arch, archErr := f.String("general.architecture")
	assert.NoError(t, archErr, "architecture")
	assert.Equal(t, "llama", arch, "architecture")
	for _, tc := range []struct {
		key  string
		want uint64
	}{{"u8", 7}, {"u16", 700}, {"u32", 70000}, {"u64", 1 << 40}} {
		got, err := f.Uint(tc.key)
		assert.NoError(t, err, "Uint(%q)", tc.key)
		assert.Equal(t, tc.want, got, "Uint(%q)", tc.key)
	}
	_, uintErr := f.Uint("i8")
	assert.ErrorIs(t, uintErr, ErrWrongType, "Uint of negative")
	_, strErr := f.String("u8")
	assert.ErrorIs(t, strErr, ErrWrongType, "String of uint8")
	_, missErr := f.Value("missing")
	assert.ErrorIs(t, missErr, ErrNotFound, "missing key")
	f64, f64Err := f.Float("f64")
	assert.NoError(t, f64Err, "Float(f64)")
	assert.Equal(t, 2.25, f64, "Float(f64)")
	v, _ := f.Value("strs")
	strs, ok := v.V.([]string)
	if assert.True(t, ok, "strs: got %#v", v.V) && assert.Len(t, strs, 3, "strs") {
		assert.Equal(t, "bc", strs[1], "strs")
	}
	a, err := f.Float32s("a")
	require.NoError(t, err)
	assert.True(t, equalF32(a, []float32{1, 2, 3, 4, 5, 6}), "tensor a: got %v, want 1..6", a)
	ti, _ := f.Tensor("b")
	assert.Equal(t, uint64(0), ti.Offset%DefaultAlignment, "tensor b offset %d not aligned", ti.Offset)
	assert.NotEqual(t, uint64(0), ti.Offset, "tensor b offset %d not aligned", ti.Offset)
	_, err = f.Float32s("zz")
	assert.ErrorIs(t, err, ErrNotFound, "missing tensor: got %v", err)
}

func equalF32(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float32bits(a[i]) != math.Float32bits(b[i]) {
			return false
		}
	}
	return true
}

// TestRealModelHeader checks the facts recorded in MODEL-SOURCE.md ("Format
// (checked by parsing the header)"): v3, 19 keys, 48 F32 tensors, data at 14176.
func TestRealModelHeader(t *testing.T) {
	f, err := Open(modelPath(t))
	require.NoError(t, err)
	assert.Equal(t, uint32(3), f.Version, "got version %d, %d keys, %d tensors, data at %d; want 3, 19, 48, 14176", f.Version, len(f.Keys), len(f.Tensors), f.DataOffset)
	if assert.Len(t, f.Keys, 19, "got version %d, %d keys, %d tensors, data at %d; want 3, 19, 48, 14176", f.Version, len(f.Keys), len(f.Tensors), f.DataOffset) {
		if assert.Len(t, f.Tensors, 48, "got version %d, %d keys, %d tensors, data at %d; want 3, 19, 48, 14176", f.Version, len(f.Keys), len(f.Tensors), f.DataOffset) {
			assert.Equal(t, uint64(14176), f.DataOffset, "got version %d, %d keys, %d tensors, data at %d; want 3, 19, 48, 14176", f.Version, len(f.Keys), len(f.Tensors), f.DataOffset)
		}
	}
	for _, ti := range f.Tensors {
		assert.Equal(t, TensorF32, ti.Type, "tensor %s: type %v, want F32", ti.Name, ti.Type)
	}
	ti, err := f.Tensor("blk.0.ffn_gate.weight")
	if assert.NoError(t, err, "ffn_gate: got %+v, %v; want dims [64 172]", ti, err) {
		if assert.Len(t, ti.Dims, 2, "ffn_gate: got %+v, %v; want dims [64 172]", ti, err) {
			assert.Equal(t, uint64(64), ti.Dims[0], "ffn_gate: got %+v, %v; want dims [64 172]", ti, err)
			assert.Equal(t, uint64(172), ti.Dims[1], "ffn_gate: got %+v, %v; want dims [64 172]", ti, err)
		}
	}
}

func TestParseErrors(t *testing.T) {
	good := smallFile(t)
	patch := func(off int, v any) []byte {
		b := bytes.Clone(good)
		var w bytes.Buffer
		_ = binary.Write(&w, binary.LittleEndian, v)
		copy(b[off:], w.Bytes())
		return b
	}
	f, err := Parse(good)
	require.NoError(t, err)
	// Offset of tensor "a"'s type field: the directory ends right before
	// the aligned data start; find it by re-encoding a file without tensors.
	dirStart := len(mustEncodeMeta(t))
	// name "a": 8+1 bytes, ndims 4, dims 16 -> type at +29, offset at +33.
	typeOff := dirStart + 8 + 1 + 4 + 16
	offsetOff := typeOff + 4
	tests := []struct {
		name string
		in   []byte
		want error
	}{
		{"empty", nil, ErrTruncated},
		{"wrong magic", append([]byte("GGML"), good[4:]...), ErrBadMagic},
		{"version 1", patch(4, uint32(1)), ErrUnsupportedVersion},
		{"version 4", patch(4, uint32(4)), ErrUnsupportedVersion},
		{"huge tensor count", patch(8, uint64(1<<60)), ErrTruncated},
		{"huge kv count", patch(16, uint64(1<<60)), ErrTruncated},
		{"tensor type Q4_0", patch(typeOff, uint32(2)), ErrUnsupportedType},
		{"tensor beyond file", patch(offsetOff, uint64(1<<20)), ErrOutOfBounds},
		{"unaligned tensor", patch(offsetOff, uint64(4)), ErrOutOfBounds},
		{"cut data", good[:len(good)-40], ErrOutOfBounds},
	}
	_ = f
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Parse(tc.in)
			assert.ErrorIs(t, err, tc.want, "got %v, want %v", err, tc.want)
		})
	}
}

func mustEncodeMeta(tb testing.TB) []byte {
	tb.Helper()
	f, err := Parse(smallFile(tb))
	require.NoError(tb, err)
	var meta []KeyValue
	for _, k := range f.Keys {
		v, _ := f.Value(k)
		meta = append(meta, KeyValue{k, v})
	}
	b, err := Encode(meta, nil)
	require.NoError(tb, err)
	// Encode pads to the alignment; find the unpadded end by re-parsing:
	// with no tensors the directory is empty, so the header ends where the
	// reader stopped. Recompute it from the last value instead of padding.
	r := &reader{b: b}
	_, _ = r.bytes(24)
	for range f.Keys {
		_, _ = r.str()
		t, _ := r.u32()
		_, _ = r.value(ValueType(t), 0)
	}
	return b[:r.off]
}

// TestTruncatedEveryOffset cuts the small file at every offset: each prefix
// must give an error, never a panic.
func TestTruncatedEveryOffset(t *testing.T) {
	good := smallFile(t)
	for n := 0; n < len(good); n++ {
		_, err := Parse(good[:n])
		require.Error(t, err, "prefix of %d/%d bytes parsed without error", n, len(good))
	}
}

// TestTruncatedRealModel cuts the real file inside its header and directory
// at every offset, and at a sample of offsets in the data section.
func TestTruncatedRealModel(t *testing.T) {
	b, err := os.ReadFile(modelPath(t))
	require.NoError(t, err)
	for n := 0; n < 14176+64; n++ {
		_, err := Parse(b[:n])
		require.Error(t, err, "prefix of %d bytes parsed without error", n)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	for range 200 {
		n := rng.IntN(len(b))
		_, err := Parse(b[:n])
		require.Error(t, err, "prefix of %d bytes parsed without error", n)
	}
}

func TestRandomBytes(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	good := smallFile(t)
	for i := range 2000 {
		var b []byte
		if i%2 == 0 {
			b = make([]byte, rng.IntN(256))
			for j := range b {
				b[j] = byte(rng.Uint32())
			}
			if i%4 == 0 && len(b) >= 8 {
				copy(b, "GGUF\x03\x00\x00\x00")
			}
		} else { // flip a few bytes of a valid file
			b = bytes.Clone(good)
			for range 1 + rng.IntN(4) {
				b[rng.IntN(len(b))] = byte(rng.Uint32())
			}
		}
		parseAndRead(b)
	}
}

// parseAndRead parses b and, when that succeeds, reads every tensor; it
// must never panic.
func parseAndRead(b []byte) {
	f, err := Parse(b)
	if err != nil {
		return
	}
	for _, ti := range f.Tensors {
		_, _ = f.Float32s(ti.Name)
	}
}

func FuzzParse(f *testing.F) {
	good := smallFile(f)
	f.Add(good)
	f.Add(good[:40])
	f.Add([]byte("GGUF"))
	f.Add([]byte{})
	f.Add(q8File(f))
	f.Fuzz(func(t *testing.T, b []byte) {
		parseAndRead(b)
	})
}

// q8File builds by hand a file with one Q8_0 tensor of 32 weights (scale
// 0.5 as f16 0x3800) and one F16 tensor of 4 values.
func q8File(tb testing.TB) []byte {
	tb.Helper()
	var b bytes.Buffer
	w := func(v any) { _ = binary.Write(&b, binary.LittleEndian, v) }
	b.WriteString("GGUF")
	w(uint32(3))
	w(uint64(2)) // tensors
	w(uint64(0)) // metadata
	w(uint64(1))
	b.WriteString("q")
	w(uint32(1))
	w(uint64(32))
	w(uint32(TensorQ8_0))
	w(uint64(0))
	w(uint64(1))
	b.WriteString("h")
	w(uint32(1))
	w(uint64(5))
	w(uint32(TensorF16))
	w(uint64(64))
	for b.Len()%32 != 0 {
		b.WriteByte(0)
	}
	w(uint16(0x3800)) // 0.5
	for i := range 32 {
		w(int8(i - 16))
	}
	for b.Len()%32 != 0 {
		b.WriteByte(0)
	}
	// IEEE 754 binary16 encodings of 1.0, -2.0, +Inf, the smallest
	// subnormal 2^-24 and 65504 (the largest finite), as Python's struct
	// module gives them (format "<e", binary16 in its documentation):
	// struct.pack("<e", v) for each v.
	w([]uint16{0x3C00, 0xC000, 0x7C00, 0x0001, 0x7BFF})
	return b.Bytes()
}

func TestDequantize(t *testing.T) {
	f, err := Parse(q8File(t))
	require.NoError(t, err)
	q, err := f.Float32s("q")
	require.NoError(t, err)
	for i, got := range q {
		want := 0.5 * float32(i-16)
		assert.Equal(t, want, got, "q[%d]: got %v, want %v", i, got, want)
	}
	h, err := f.Float32s("h")
	require.NoError(t, err)
	want := []float32{1, -2, float32(math.Inf(1)), float32(math.Ldexp(1, -24)), 65504}
	assert.True(t, equalF32(h, want), "f16: got %v, want %v", h, want)
}
