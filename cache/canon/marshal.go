package canon

import (
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"strconv"
	"unicode/utf8"
	"unsafe"
)

// Marshal returns the RFC 8785 canonical form of v, a value as encoding/json
// decodes JSON into an interface: nil, bool, string, json.Number (decode with
// Decoder.UseNumber so numbers keep their text) or float64, []any and
// map[string]any, nested freely. It also accepts int and int64 (taken as the
// nearest double, as ECMAScript would, unless Canonicalizer.ExactIntegers), json.RawMessage (canonicalized with
// Transform), and map[string]json.RawMessage, the usual shape for a body whose
// unknown fields are passed through untouched.
//
// A map cannot hold duplicate names, so duplicates in the original text must
// be caught where it is decoded (or by running Transform on it); strings must
// be valid UTF-8.
func Marshal(v any) ([]byte, error) {
	var c Canonicalizer
	return c.AppendValue(nil, v)
}

// AppendValue appends the canonical form of v (see Marshal) to dst and
// returns the extended slice. On error dst is returned unchanged (its spare
// capacity may have been written to).
func (c *Canonicalizer) AppendValue(dst []byte, v any) ([]byte, error) {
	m := &c.m
	m.names = m.names[:0]
	m.c = c
	out, err := m.value(dst, v, 0)
	m.c = nil
	clear(m.names[:cap(m.names)]) // drop references to the caller's strings
	if err != nil {
		return dst, err
	}
	return out, nil
}

// marshaler walks decoded values. names is a work stack of member names:
// each map sorts its own segment, above its parent's.
type marshaler struct {
	c     *Canonicalizer
	names []string
}

func (m *marshaler) value(dst []byte, v any, depth int) ([]byte, error) {
	switch x := v.(type) {
	case nil:
		return append(dst, "null"...), nil
	case bool:
		if x {
			return append(dst, "true"...), nil
		}
		return append(dst, "false"...), nil
	case string:
		if !utf8.ValidString(x) {
			return dst, fmt.Errorf("%w: string is not valid UTF-8", ErrSyntax)
		}
		return appendQuoted(dst, x), nil
	case json.Number:
		return appendNumberText(dst, string(x), m.c.ExactIntegers)
	case float64:
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return dst, fmt.Errorf("%w: %v", ErrNumberRange, x)
		}
		return appendNumber(dst, x), nil
	case int:
		return m.appendInt(dst, int64(x)), nil
	case int64:
		return m.appendInt(dst, x), nil
	case json.RawMessage:
		return m.raw(dst, x)
	case []any:
		if depth+1 > MaxDepth {
			return dst, fmt.Errorf("%w: more than %d nested arrays and objects", ErrTooDeep, MaxDepth)
		}
		dst = append(dst, '[')
		for i, e := range x {
			if i > 0 {
				dst = append(dst, ',')
			}
			var err error
			if dst, err = m.value(dst, e, depth+1); err != nil {
				return dst, err
			}
		}
		return append(dst, ']'), nil
	case map[string]any:
		return appendMap(m, dst, x, depth)
	case map[string]json.RawMessage:
		return appendMap(m, dst, x, depth)
	default:
		return dst, fmt.Errorf("%w: %T", ErrUnsupportedType, v)
	}
}

// raw canonicalizes embedded JSON text with the Canonicalizer's parser, which
// is free: a parse never calls back into the marshaler.
func (m *marshaler) raw(dst []byte, x json.RawMessage) ([]byte, error) {
	p := &m.c.p
	p.reset(x)
	p.exact = m.c.ExactIntegers
	root, err := p.parseDocument()
	if err == nil {
		dst = p.write(dst, root)
	}
	p.release()
	return dst, err
}

func appendMap[V any](m *marshaler, dst []byte, x map[string]V, depth int) ([]byte, error) {
	if depth+1 > MaxDepth {
		return dst, fmt.Errorf("%w: more than %d nested arrays and objects", ErrTooDeep, MaxDepth)
	}
	mark := len(m.names)
	for k := range x {
		if !utf8.ValidString(k) {
			return dst, fmt.Errorf("%w: member name is not valid UTF-8", ErrSyntax)
		}
		m.names = append(m.names, k)
	}
	names := m.names[mark:]
	slices.SortFunc(names, compareUTF16[string])
	dst = append(dst, '{')
	for i := range names {
		if i > 0 {
			dst = append(dst, ',')
		}
		// Reslice each time: a nested map may have grown m.names.
		k := m.names[mark+i]
		dst = appendQuoted(dst, k)
		dst = append(dst, ':')
		var err error
		if raws, ok := any(x).(map[string]json.RawMessage); ok {
			dst, err = m.raw(dst, raws[k]) // no boxing of each value
		} else {
			dst, err = m.value(dst, any(x[k]), depth+1)
		}
		if err != nil {
			return dst, err
		}
	}
	m.names = m.names[:mark]
	return append(dst, '}'), nil
}

// appendInt writes an integer as the nearest double, or with its own
// digits when ExactIntegers is set and a double cannot hold it exactly.
func (m *marshaler) appendInt(dst []byte, x int64) []byte {
	if m.c.ExactIntegers && (x > 1<<53-1 || x < -(1<<53-1)) {
		return strconv.AppendInt(dst, x, 10)
	}
	return appendNumber(dst, float64(x))
}

// appendNumberText canonicalizes the text of a json.Number, checking the
// RFC 8259 grammar first (a json.Number can be built from any string), with
// a wide integer's own digits when exact is set. The bytes are viewed
// without copying and only read.
func appendNumberText(dst []byte, s string, exact bool) ([]byte, error) {
	p := parser{in: unsafe.Slice(unsafe.StringData(s), len(s))}
	if len(s) == 0 || !(s[0] == '-' || (s[0] >= '0' && s[0] <= '9')) {
		return dst, fmt.Errorf("%w: json.Number %s is not a JSON number", ErrSyntax, quoteForError([]byte(s)))
	}
	n, err := p.number()
	if err != nil {
		return dst, err
	}
	if p.i != len(s) {
		return dst, fmt.Errorf("%w: json.Number %s is not a JSON number", ErrSyntax, quoteForError([]byte(s)))
	}
	if n.verbatim || (n.wide && exact) {
		return append(dst, s...), nil
	}
	return appendNumber(dst, n.num), nil
}
