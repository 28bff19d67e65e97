// Package gguf reads GGUF model files: the header, the typed metadata, the
// tensor directory and the tensor data.
//
// The reader works on a byte slice that holds the whole file and checks every
// length, count and extent against it, so malformed input (truncated files,
// wrong magic, unsupported versions or tensor types, tensors that reach past
// the end) gives an error wrapping one of the sentinel errors below, never a
// panic. Versions 2 and 3 are read; tensor data of type F32, F16 and Q8_0 can
// be read as float32 (F16 and Q8_0 are dequantized).
//
// It is written by hand because the format is small and no well-kept Go
// library for it exists among this module's dependencies.
package gguf

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"os"
)

// Sentinel errors; every error from Parse and the accessors wraps one of them.
var (
	// ErrTruncated means the file ends before a header field, a metadata
	// value or the tensor directory is complete.
	ErrTruncated = errors.New("gguf: file truncated")
	// ErrBadMagic means the file does not start with "GGUF".
	ErrBadMagic = errors.New("gguf: bad magic")
	// ErrUnsupportedVersion means the GGUF version is not 2 or 3.
	ErrUnsupportedVersion = errors.New("gguf: unsupported version")
	// ErrUnsupportedType means a metadata value type or tensor type is unknown
	// or cannot be read.
	ErrUnsupportedType = errors.New("gguf: unsupported type")
	// ErrOutOfBounds means a tensor's data reaches beyond the end of the file,
	// or its offset or shape is invalid.
	ErrOutOfBounds = errors.New("gguf: tensor extent out of bounds")
	// ErrMalformed means a structural field has an impossible value (a
	// duplicate key, a bad alignment, too many dimensions, a huge count).
	ErrMalformed = errors.New("gguf: malformed file")
	// ErrNotFound means a metadata key or tensor name is absent.
	ErrNotFound = errors.New("gguf: not found")
	// ErrWrongType means a metadata value has a different type than asked.
	ErrWrongType = errors.New("gguf: wrong value type")
)

// Magic is the 4-byte file signature.
const Magic = "GGUF"

// DefaultAlignment applies when the file has no general.alignment key.
const DefaultAlignment = 32

// maxDims bounds a tensor's dimension count (ggml uses at most 4).
const maxDims = 8

// maxDepth bounds how deeply arrays may nest in metadata.
const maxDepth = 4

// ValueType is a metadata value's type code.
type ValueType uint32

// Metadata value types, as numbered by the format.
const (
	TypeUint8   ValueType = 0
	TypeInt8    ValueType = 1
	TypeUint16  ValueType = 2
	TypeInt16   ValueType = 3
	TypeUint32  ValueType = 4
	TypeInt32   ValueType = 5
	TypeFloat32 ValueType = 6
	TypeBool    ValueType = 7
	TypeString  ValueType = 8
	TypeArray   ValueType = 9
	TypeUint64  ValueType = 10
	TypeInt64   ValueType = 11
	TypeFloat64 ValueType = 12
)

// TensorType is a tensor's element encoding.
type TensorType uint32

// Tensor types this package can read as float32. Other ggml types are
// reported with ErrUnsupportedType.
const (
	TensorF32  TensorType = 0
	TensorF16  TensorType = 1
	TensorQ8_0 TensorType = 8
)

// q8Block is the number of weights in one Q8_0 block (an f16 scale and 32 int8).
const q8Block = 32

func (t TensorType) String() string {
	switch t {
	case TensorF32:
		return "F32"
	case TensorF16:
		return "F16"
	case TensorQ8_0:
		return "Q8_0"
	}
	return fmt.Sprintf("type(%d)", uint32(t))
}

// Value is one metadata value. Scalars hold the Go type that matches Type
// (uint8, int8, uint16, int16, uint32, int32, float32, bool, string, uint64,
// int64, float64); arrays hold a typed slice of their element type
// ([]uint8 … []float64, []string, []bool), or []Value for nested arrays.
type Value struct {
	// Type is the value's type code.
	Type ValueType
	// Elem is the element type when Type is TypeArray.
	Elem ValueType
	// V is the decoded value.
	V any
}

// TensorInfo describes one tensor from the directory.
type TensorInfo struct {
	// Name is the tensor's name, e.g. "blk.0.attn_q.weight".
	Name string
	// Dims are the dimensions, ne0 first (ne0 is contiguous in memory).
	Dims []uint64
	// Type is the element encoding.
	Type TensorType
	// Offset is the data offset relative to the start of the data section.
	Offset uint64
	// Size is the data size in bytes.
	Size uint64
}

// Elements returns the number of elements (the product of Dims).
func (t TensorInfo) Elements() uint64 {
	n := uint64(1)
	for _, d := range t.Dims {
		n *= d
	}
	return n
}

// File is a parsed GGUF file. It is immutable after Parse and safe for
// concurrent use.
type File struct {
	// Version is the format version (2 or 3).
	Version uint32
	// Keys lists the metadata keys in file order.
	Keys []string
	// Tensors lists the tensor directory in file order.
	Tensors []TensorInfo
	// Alignment is the data alignment in bytes.
	Alignment uint64
	// DataOffset is the file offset where tensor data starts.
	DataOffset uint64

	meta    map[string]Value
	tensors map[string]int
	data    []byte
}

// Open reads the whole file at path and parses it.
func Open(path string) (*File, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("gguf: %w", err)
	}
	f, err := Parse(b)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return f, nil
}

// Parse parses a GGUF file held in b. The File keeps a reference to b for
// tensor data; b must not be modified afterwards.
func Parse(b []byte) (*File, error) {
	r := &reader{b: b}
	magic, err := r.bytes(4)
	if err != nil {
		return nil, fmt.Errorf("reading magic: %w", err)
	}
	if string(magic) != Magic {
		return nil, fmt.Errorf("%w: got %q, want %q", ErrBadMagic, magic, Magic)
	}
	f := &File{meta: map[string]Value{}, tensors: map[string]int{}, data: b, Alignment: DefaultAlignment}
	if f.Version, err = r.u32(); err != nil {
		return nil, fmt.Errorf("reading version: %w", err)
	}
	if f.Version != 2 && f.Version != 3 {
		return nil, fmt.Errorf("%w: %d (want 2 or 3)", ErrUnsupportedVersion, f.Version)
	}
	nTensors, err := r.u64()
	if err != nil {
		return nil, fmt.Errorf("reading tensor count: %w", err)
	}
	nKV, err := r.u64()
	if err != nil {
		return nil, fmt.Errorf("reading metadata count: %w", err)
	}
	// Each key-value pair takes at least 12 bytes and each tensor entry at
	// least 24, so a count beyond that is impossible; checking it here keeps
	// a hostile count from driving a huge allocation.
	if nKV > uint64(r.left())/12 {
		return nil, fmt.Errorf("%w: metadata count %d exceeds file size", ErrTruncated, nKV)
	}
	for i := uint64(0); i < nKV; i++ {
		key, err := r.str()
		if err != nil {
			return nil, fmt.Errorf("metadata %d key: %w", i, err)
		}
		t, err := r.u32()
		if err != nil {
			return nil, fmt.Errorf("metadata %q type: %w", key, err)
		}
		v, err := r.value(ValueType(t), 0)
		if err != nil {
			return nil, fmt.Errorf("metadata %q: %w", key, err)
		}
		if _, dup := f.meta[key]; dup {
			return nil, fmt.Errorf("%w: duplicate metadata key %q", ErrMalformed, key)
		}
		f.meta[key] = v
		f.Keys = append(f.Keys, key)
	}
	if v, ok := f.meta["general.alignment"]; ok {
		a, err := v.Uint()
		if err != nil {
			return nil, fmt.Errorf("general.alignment: %w", err)
		}
		if a == 0 || a&(a-1) != 0 || a > 1<<20 {
			return nil, fmt.Errorf("%w: alignment %d is not a power of two up to 1 MiB", ErrMalformed, a)
		}
		f.Alignment = a
	}
	if nTensors > uint64(r.left())/24 {
		return nil, fmt.Errorf("%w: tensor count %d exceeds file size", ErrTruncated, nTensors)
	}
	f.Tensors = make([]TensorInfo, 0, nTensors)
	for i := uint64(0); i < nTensors; i++ {
		ti, err := r.tensorInfo()
		if err != nil {
			return nil, fmt.Errorf("tensor %d: %w", i, err)
		}
		if _, dup := f.tensors[ti.Name]; dup {
			return nil, fmt.Errorf("%w: duplicate tensor %q", ErrMalformed, ti.Name)
		}
		f.tensors[ti.Name] = len(f.Tensors)
		f.Tensors = append(f.Tensors, ti)
	}
	f.DataOffset = alignUp(uint64(r.off), f.Alignment)
	for _, ti := range f.Tensors {
		if ti.Offset%f.Alignment != 0 {
			return nil, fmt.Errorf("%w: tensor %q offset %d not aligned to %d", ErrOutOfBounds, ti.Name, ti.Offset, f.Alignment)
		}
		start := f.DataOffset + ti.Offset
		if start < f.DataOffset || start > uint64(len(b)) || ti.Size > uint64(len(b))-start {
			return nil, fmt.Errorf("%w: tensor %q needs bytes [%d, %d+%d) of a %d-byte file",
				ErrOutOfBounds, ti.Name, start, start, ti.Size, len(b))
		}
	}
	return f, nil
}

func alignUp(x, a uint64) uint64 { return (x + a - 1) / a * a }

// Value returns the metadata value for key.
func (f *File) Value(key string) (Value, error) {
	v, ok := f.meta[key]
	if !ok {
		return Value{}, fmt.Errorf("%w: metadata key %q", ErrNotFound, key)
	}
	return v, nil
}

// String returns a string metadata value.
func (f *File) String(key string) (string, error) {
	v, err := f.Value(key)
	if err != nil {
		return "", err
	}
	s, ok := v.V.(string)
	if !ok {
		return "", fmt.Errorf("%w: %q is type %d, want string", ErrWrongType, key, v.Type)
	}
	return s, nil
}

// Uint returns an unsigned or non-negative signed integer metadata value.
func (f *File) Uint(key string) (uint64, error) {
	v, err := f.Value(key)
	if err != nil {
		return 0, err
	}
	u, err := v.Uint()
	if err != nil {
		return 0, fmt.Errorf("%q: %w", key, err)
	}
	return u, nil
}

// Float returns a floating-point metadata value.
func (f *File) Float(key string) (float64, error) {
	v, err := f.Value(key)
	if err != nil {
		return 0, err
	}
	switch x := v.V.(type) {
	case float32:
		return float64(x), nil
	case float64:
		return x, nil
	}
	return 0, fmt.Errorf("%w: %q is type %d, want a float", ErrWrongType, key, v.Type)
}

// Uint converts an integer scalar to uint64. Negative values give ErrWrongType.
func (v Value) Uint() (uint64, error) {
	var s int64
	switch x := v.V.(type) {
	case uint8:
		return uint64(x), nil
	case uint16:
		return uint64(x), nil
	case uint32:
		return uint64(x), nil
	case uint64:
		return x, nil
	case int8:
		s = int64(x)
	case int16:
		s = int64(x)
	case int32:
		s = int64(x)
	case int64:
		s = x
	default:
		return 0, fmt.Errorf("%w: type %d is not an integer", ErrWrongType, v.Type)
	}
	if s < 0 {
		return 0, fmt.Errorf("%w: negative value %d", ErrWrongType, s)
	}
	return uint64(s), nil
}

// Tensor returns the directory entry for name.
func (f *File) Tensor(name string) (TensorInfo, error) {
	i, ok := f.tensors[name]
	if !ok {
		return TensorInfo{}, fmt.Errorf("%w: tensor %q", ErrNotFound, name)
	}
	return f.Tensors[i], nil
}

// TensorData returns the raw bytes of the named tensor (a view of the file;
// do not modify it).
func (f *File) TensorData(name string) ([]byte, error) {
	ti, err := f.Tensor(name)
	if err != nil {
		return nil, err
	}
	start := f.DataOffset + ti.Offset
	return f.data[start : start+ti.Size], nil
}

// Float32s returns the named tensor's elements as a new float32 slice,
// dequantizing F16 and Q8_0 data.
func (f *File) Float32s(name string) ([]float32, error) {
	ti, err := f.Tensor(name)
	if err != nil {
		return nil, err
	}
	raw, err := f.TensorData(name)
	if err != nil {
		return nil, err
	}
	n := ti.Elements()
	out := make([]float32, n)
	switch ti.Type {
	case TensorF32:
		for i := range out {
			out[i] = math.Float32frombits(binary.LittleEndian.Uint32(raw[4*i:]))
		}
	case TensorF16:
		for i := range out {
			out[i] = halfToFloat(binary.LittleEndian.Uint16(raw[2*i:]))
		}
	case TensorQ8_0:
		for blk := uint64(0); blk < n/q8Block; blk++ {
			b := raw[blk*34 : blk*34+34]
			d := halfToFloat(binary.LittleEndian.Uint16(b))
			for j := 0; j < q8Block; j++ {
				out[blk*q8Block+uint64(j)] = d * float32(int8(b[2+j]))
			}
		}
	default:
		return nil, fmt.Errorf("%w: tensor %q has type %v", ErrUnsupportedType, name, ti.Type)
	}
	return out, nil
}

// halfToFloat converts an IEEE 754 binary16 value to float32. Written by hand
// because the standard library has no float16 type.
func halfToFloat(h uint16) float32 {
	sign := uint32(h>>15) << 31
	exp := uint32(h>>10) & 0x1f
	frac := uint32(h) & 0x3ff
	switch {
	case exp == 0 && frac == 0:
		return math.Float32frombits(sign)
	case exp == 0: // subnormal: value = frac * 2^-24
		v := float32(frac) / (1 << 24)
		if sign != 0 {
			v = -v
		}
		return v
	case exp == 0x1f:
		return math.Float32frombits(sign | 0xff<<23 | frac<<13)
	}
	return math.Float32frombits(sign | (exp+127-15)<<23 | frac<<13)
}

// reader decodes little-endian fields from a byte slice with bounds checks.
type reader struct {
	b   []byte
	off int
}

func (r *reader) left() int { return len(r.b) - r.off }

func (r *reader) bytes(n uint64) ([]byte, error) {
	if n > uint64(r.left()) {
		return nil, fmt.Errorf("%w: need %d bytes at offset %d, have %d", ErrTruncated, n, r.off, r.left())
	}
	s := r.b[r.off : r.off+int(n)]
	r.off += int(n)
	return s, nil
}

func (r *reader) u8() (uint8, error) {
	b, err := r.bytes(1)
	if err != nil {
		return 0, err
	}
	return b[0], nil
}

func (r *reader) u16() (uint16, error) {
	b, err := r.bytes(2)
	if err != nil {
		return 0, err
	}
	return binary.LittleEndian.Uint16(b), nil
}

func (r *reader) u32() (uint32, error) {
	b, err := r.bytes(4)
	if err != nil {
		return 0, err
	}
	return binary.LittleEndian.Uint32(b), nil
}

func (r *reader) u64() (uint64, error) {
	b, err := r.bytes(8)
	if err != nil {
		return 0, err
	}
	return binary.LittleEndian.Uint64(b), nil
}

func (r *reader) str() (string, error) {
	n, err := r.u64()
	if err != nil {
		return "", err
	}
	b, err := r.bytes(n)
	if err != nil {
		return "", err
	}
	return string(b), nil
}

// scalarSize is the encoded size of a fixed-size scalar type, or 0.
func scalarSize(t ValueType) uint64 {
	switch t {
	case TypeUint8, TypeInt8, TypeBool:
		return 1
	case TypeUint16, TypeInt16:
		return 2
	case TypeUint32, TypeInt32, TypeFloat32:
		return 4
	case TypeUint64, TypeInt64, TypeFloat64:
		return 8
	}
	return 0
}

func (r *reader) scalar(t ValueType) (any, error) {
	switch t {
	case TypeUint8:
		return r.u8()
	case TypeInt8:
		v, err := r.u8()
		return int8(v), err
	case TypeBool:
		v, err := r.u8()
		if err == nil && v > 1 {
			return nil, fmt.Errorf("%w: bool byte %d", ErrMalformed, v)
		}
		return v == 1, err
	case TypeUint16:
		return r.u16()
	case TypeInt16:
		v, err := r.u16()
		return int16(v), err
	case TypeUint32:
		return r.u32()
	case TypeInt32:
		v, err := r.u32()
		return int32(v), err
	case TypeFloat32:
		v, err := r.u32()
		return math.Float32frombits(v), err
	case TypeUint64:
		return r.u64()
	case TypeInt64:
		v, err := r.u64()
		return int64(v), err
	case TypeFloat64:
		v, err := r.u64()
		return math.Float64frombits(v), err
	case TypeString:
		return r.str()
	}
	return nil, fmt.Errorf("%w: metadata value type %d", ErrUnsupportedType, t)
}

func (r *reader) value(t ValueType, depth int) (Value, error) {
	if t != TypeArray {
		v, err := r.scalar(t)
		if err != nil {
			return Value{}, err
		}
		return Value{Type: t, V: v}, nil
	}
	if depth >= maxDepth {
		return Value{}, fmt.Errorf("%w: arrays nested deeper than %d", ErrMalformed, maxDepth)
	}
	et, err := r.u32()
	if err != nil {
		return Value{}, err
	}
	n, err := r.u64()
	if err != nil {
		return Value{}, err
	}
	elem := ValueType(et)
	// Every element takes at least one byte (strings and arrays at least 8),
	// so a count beyond the bytes left is a truncated file.
	minSize := scalarSize(elem)
	if elem == TypeString || elem == TypeArray {
		minSize = 8
	}
	if minSize == 0 {
		return Value{}, fmt.Errorf("%w: array element type %d", ErrUnsupportedType, et)
	}
	if n > uint64(r.left())/minSize {
		return Value{}, fmt.Errorf("%w: array of %d elements needs more than the %d bytes left", ErrTruncated, n, r.left())
	}
	out := Value{Type: TypeArray, Elem: elem}
	switch elem {
	case TypeUint8:
		out.V, err = readArray(r, n, r.u8)
	case TypeInt8:
		out.V, err = readArray(r, n, func() (int8, error) { v, err := r.u8(); return int8(v), err })
	case TypeBool:
		out.V, err = readArray(r, n, func() (bool, error) { v, err := r.scalar(TypeBool); b, _ := v.(bool); return b, err })
	case TypeUint16:
		out.V, err = readArray(r, n, r.u16)
	case TypeInt16:
		out.V, err = readArray(r, n, func() (int16, error) { v, err := r.u16(); return int16(v), err })
	case TypeUint32:
		out.V, err = readArray(r, n, r.u32)
	case TypeInt32:
		out.V, err = readArray(r, n, func() (int32, error) { v, err := r.u32(); return int32(v), err })
	case TypeFloat32:
		out.V, err = readArray(r, n, func() (float32, error) { v, err := r.u32(); return math.Float32frombits(v), err })
	case TypeUint64:
		out.V, err = readArray(r, n, r.u64)
	case TypeInt64:
		out.V, err = readArray(r, n, func() (int64, error) { v, err := r.u64(); return int64(v), err })
	case TypeFloat64:
		out.V, err = readArray(r, n, func() (float64, error) { v, err := r.u64(); return math.Float64frombits(v), err })
	case TypeString:
		out.V, err = readArray(r, n, r.str)
	case TypeArray:
		out.V, err = readArray(r, n, func() (Value, error) { return r.value(TypeArray, depth+1) })
	}
	if err != nil {
		return Value{}, err
	}
	return out, nil
}

func readArray[T any](r *reader, n uint64, next func() (T, error)) ([]T, error) {
	out := make([]T, n)
	for i := range out {
		v, err := next()
		if err != nil {
			return nil, fmt.Errorf("array element %d: %w", i, err)
		}
		out[i] = v
	}
	return out, nil
}

func (r *reader) tensorInfo() (TensorInfo, error) {
	var ti TensorInfo
	var err error
	if ti.Name, err = r.str(); err != nil {
		return ti, fmt.Errorf("name: %w", err)
	}
	nd, err := r.u32()
	if err != nil {
		return ti, fmt.Errorf("%q dimension count: %w", ti.Name, err)
	}
	if nd == 0 || nd > maxDims {
		return ti, fmt.Errorf("%w: tensor %q has %d dimensions", ErrMalformed, ti.Name, nd)
	}
	n := uint64(1)
	for i := uint32(0); i < nd; i++ {
		d, err := r.u64()
		if err != nil {
			return ti, fmt.Errorf("%q dimension %d: %w", ti.Name, i, err)
		}
		if d == 0 || n > math.MaxUint64/d {
			return ti, fmt.Errorf("%w: tensor %q dimension %d is %d", ErrOutOfBounds, ti.Name, i, d)
		}
		n *= d
		ti.Dims = append(ti.Dims, d)
	}
	t, err := r.u32()
	if err != nil {
		return ti, fmt.Errorf("%q type: %w", ti.Name, err)
	}
	ti.Type = TensorType(t)
	if ti.Offset, err = r.u64(); err != nil {
		return ti, fmt.Errorf("%q offset: %w", ti.Name, err)
	}
	switch ti.Type {
	case TensorF32:
		ti.Size, err = mulSize(n, 4)
	case TensorF16:
		ti.Size, err = mulSize(n, 2)
	case TensorQ8_0:
		if n%q8Block != 0 || ti.Dims[0]%q8Block != 0 {
			return ti, fmt.Errorf("%w: Q8_0 tensor %q row length %d is not a multiple of %d", ErrMalformed, ti.Name, ti.Dims[0], q8Block)
		}
		ti.Size, err = mulSize(n/q8Block, 34)
	default:
		return ti, fmt.Errorf("%w: tensor %q has type %v (supported: F32, F16, Q8_0)", ErrUnsupportedType, ti.Name, ti.Type)
	}
	if err != nil {
		return ti, fmt.Errorf("tensor %q: %w", ti.Name, err)
	}
	return ti, nil
}

func mulSize(n, s uint64) (uint64, error) {
	if n > math.MaxUint64/s {
		return 0, fmt.Errorf("%w: size overflows", ErrOutOfBounds)
	}
	return n * s, nil
}
