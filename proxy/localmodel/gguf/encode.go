package gguf

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"math"
)

// KeyValue is one metadata entry for Encode.
type KeyValue struct {
	// Key is the metadata key.
	Key string
	// Value is the value; V must hold the Go type matching Type (see Value).
	Value Value
}

// F32Tensor is one float32 tensor for Encode.
type F32Tensor struct {
	// Name is the tensor name.
	Name string
	// Dims are the dimensions, ne0 first; their product must equal len(Data).
	Dims []uint64
	// Data holds the elements.
	Data []float32
}

// Encode writes a version-3 GGUF file with the given metadata and F32
// tensors, aligned to DefaultAlignment (or general.alignment if given). It
// exists to build small fixtures in tests; model files come from elsewhere.
func Encode(meta []KeyValue, tensors []F32Tensor) ([]byte, error) {
	var buf bytes.Buffer
	w := func(v any) { _ = binary.Write(&buf, binary.LittleEndian, v) }
	ws := func(s string) { w(uint64(len(s))); buf.WriteString(s) }
	buf.WriteString(Magic)
	w(uint32(3))
	w(uint64(len(tensors)))
	w(uint64(len(meta)))
	align := uint64(DefaultAlignment)
	for _, kv := range meta {
		ws(kv.Key)
		w(uint32(kv.Value.Type))
		if err := encodeValue(&buf, kv.Value); err != nil {
			return nil, fmt.Errorf("metadata %q: %w", kv.Key, err)
		}
		if kv.Key == "general.alignment" {
			a, err := kv.Value.Uint()
			if err != nil || a == 0 {
				return nil, fmt.Errorf("general.alignment: %w", ErrMalformed)
			}
			align = a
		}
	}
	off := uint64(0)
	for _, t := range tensors {
		n := uint64(1)
		for _, d := range t.Dims {
			n *= d
		}
		if n != uint64(len(t.Data)) {
			return nil, fmt.Errorf("tensor %q: dims give %d elements, data has %d: %w", t.Name, n, len(t.Data), ErrMalformed)
		}
		ws(t.Name)
		w(uint32(len(t.Dims)))
		for _, d := range t.Dims {
			w(d)
		}
		w(uint32(TensorF32))
		w(off)
		off = alignUp(off+4*n, align)
	}
	pad := func() {
		for uint64(buf.Len())%align != 0 {
			buf.WriteByte(0)
		}
	}
	pad()
	for i, t := range tensors {
		if i > 0 {
			pad() // no padding after the last tensor: the file ends with its data
		}
		for _, x := range t.Data {
			w(math.Float32bits(x))
		}
	}
	return buf.Bytes(), nil
}

func encodeValue(buf *bytes.Buffer, v Value) error {
	w := func(x any) { _ = binary.Write(buf, binary.LittleEndian, x) }
	ws := func(s string) { w(uint64(len(s))); buf.WriteString(s) }
	switch x := v.V.(type) {
	case string:
		ws(x)
	case bool:
		if x {
			buf.WriteByte(1)
		} else {
			buf.WriteByte(0)
		}
	case uint8, int8, uint16, int16, uint32, int32, float32, uint64, int64, float64:
		w(x)
	case []string:
		w(uint32(TypeString))
		w(uint64(len(x)))
		for _, s := range x {
			ws(s)
		}
	case []float32:
		w(uint32(TypeFloat32))
		w(uint64(len(x)))
		w(x)
	case []int32:
		w(uint32(TypeInt32))
		w(uint64(len(x)))
		w(x)
	case []uint32:
		w(uint32(TypeUint32))
		w(uint64(len(x)))
		w(x)
	default:
		return fmt.Errorf("%w: cannot encode %T", ErrUnsupportedType, v.V)
	}
	return nil
}
