package canon

import (
	"math"
	"strconv"
	"unicode/utf8"
	"unsafe"
)

// number scans the number at p.i (RFC 8259 §6 grammar) and returns its node.
func (p *parser) number() (node, error) {
	in := p.in
	start := p.i
	i := start
	if in[i] == '-' {
		i++
	}
	digitsStart := i
	switch {
	case i < len(in) && in[i] == '0':
		i++
	case i < len(in) && in[i] >= '1' && in[i] <= '9':
		for i < len(in) && in[i] >= '0' && in[i] <= '9' {
			i++
		}
	default:
		p.i = i
		return node{}, p.errorf(ErrSyntax, "invalid number")
	}
	intDigits := i - digitsStart
	plain := true
	if i < len(in) && in[i] == '.' {
		plain = false
		i++
		d := i
		for i < len(in) && in[i] >= '0' && in[i] <= '9' {
			i++
		}
		if i == d {
			p.i = i
			return node{}, p.errorf(ErrSyntax, "invalid number: no digits after '.'")
		}
	}
	if i < len(in) && (in[i] == 'e' || in[i] == 'E') {
		plain = false
		i++
		if i < len(in) && (in[i] == '+' || in[i] == '-') {
			i++
		}
		d := i
		for i < len(in) && in[i] >= '0' && in[i] <= '9' {
			i++
		}
		if i == d {
			p.i = i
			return node{}, p.errorf(ErrSyntax, "invalid number: no digits in exponent")
		}
	}
	p.i = i
	text := in[start:i]
	// An integer of at most 15 digits is exactly representable, below 1e21,
	// and (the grammar forbids leading zeros) already in ECMAScript form;
	// "-0" is the exception, since RFC 8785 §3.2.2.3 writes minus zero as 0.
	if plain && intDigits <= 15 && !(intDigits == 1 && in[digitsStart] == '0' && start != digitsStart) {
		return node{kind: kindNumber, verbatim: true, lo: start, hi: i}, nil
	}
	f, err := parseFloat(text)
	if err != nil {
		p.i = start
		return node{}, p.errorf(ErrNumberRange, "number %s", quoteForError(text))
	}
	return node{kind: kindNumber, num: f, lo: start, hi: i, wide: plain && wideDigits(in[digitsStart:i])}, nil
}

// maxExact is 2^53-1, the largest integer of the range RFC 7493 §2.2 says a
// double holds exactly.
const maxExact = "9007199254740991"

// wideDigits reports whether the digits of an integer (no sign, no leading
// zeros) are beyond maxExact.
func wideDigits(d []byte) bool {
	if len(d) != len(maxExact) {
		return len(d) > len(maxExact)
	}
	return string(d) > maxExact
}

// parseFloat parses grammar-checked number text. The text is viewed as a
// string without copying: strconv.ParseFloat does not retain it except in its
// error, which is discarded here, and the bytes are not modified meanwhile.
func parseFloat(text []byte) (float64, error) {
	f, err := strconv.ParseFloat(unsafe.String(unsafe.SliceData(text), len(text)), 64)
	if err != nil || math.IsInf(f, 0) {
		return 0, ErrNumberRange
	}
	return f, nil
}

// appendNumber appends f as ECMAScript's Number::toString writes it, which
// RFC 8785 §3.2.2.3 adopts: the shortest digits that round-trip, plain
// notation for 1e-6 <= |f| < 1e21 and exponent notation otherwise, the
// exponent always signed and never zero-padded ("1e+21", "1e-7"), and minus
// zero written as 0. strconv's shortest formatting picks the same digits as
// ECMAScript (encoding/json relies on this too); only the exponent's zero
// padding differs.
func appendNumber(dst []byte, f float64) []byte {
	if f == 0 {
		return append(dst, '0')
	}
	abs := math.Abs(f)
	if abs >= 1e-6 && abs < 1e21 {
		return strconv.AppendFloat(dst, f, 'f', -1, 64)
	}
	dst = strconv.AppendFloat(dst, f, 'e', -1, 64)
	// strconv writes at least two exponent digits ("1e-07"); ECMAScript none
	// extra ("1e-7"). The exponent is the tail after the last 'e' and its sign.
	e := len(dst) - 1
	for dst[e] != 'e' {
		e--
	}
	if e+3 < len(dst) && dst[e+2] == '0' {
		copy(dst[e+2:], dst[e+3:])
		dst = dst[:len(dst)-1]
	}
	return dst
}

// appendQuoted appends s (valid UTF-8) as a JSON string with RFC 8785
// §3.2.2.2 escaping: '"' and '\\' get a backslash; U+0008, U+0009, U+000A,
// U+000C and U+000D use \b \t \n \f \r; other control characters below
// U+0020 use \u00xx with lowercase hex; everything else is written as is
// (no escaping of '/', HTML characters, U+007F, U+2028 or U+2029).
func appendQuoted[S ~string | ~[]byte](dst []byte, s S) []byte {
	const hex = "0123456789abcdef"
	dst = append(dst, '"')
	start := 0
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c >= 0x20 && c != '"' && c != '\\' {
			continue
		}
		dst = append(dst, s[start:i]...)
		switch c {
		case '"', '\\':
			dst = append(dst, '\\', c)
		case '\b':
			dst = append(dst, '\\', 'b')
		case '\t':
			dst = append(dst, '\\', 't')
		case '\n':
			dst = append(dst, '\\', 'n')
		case '\f':
			dst = append(dst, '\\', 'f')
		case '\r':
			dst = append(dst, '\\', 'r')
		default:
			dst = append(dst, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xf])
		}
		start = i + 1
	}
	dst = append(dst, s[start:]...)
	return append(dst, '"')
}

// compareUTF16 compares two valid UTF-8 strings by their UTF-16 code units,
// the member order of RFC 8785 §3.2.3. UTF-8 byte order equals code point
// order, which differs from UTF-16 order only when a supplementary character
// (a surrogate pair, units 0xD800-0xDFFF) meets one in U+E000-U+FFFF, so
// bytes are compared directly and only the first differing characters are
// decoded.
func compareUTF16[S ~string | ~[]byte](a, b S) int {
	n := min(len(a), len(b))
	i := 0
	for i < n && a[i] == b[i] {
		i++
	}
	if i == n {
		return len(a) - len(b)
	}
	if a[i] < utf8.RuneSelf && b[i] < utf8.RuneSelf {
		return int(a[i]) - int(b[i])
	}
	// Back up to the start of the character holding the first difference;
	// the common prefix puts that start at the same offset in both.
	for i > 0 && !utf8.RuneStart(a[i]) {
		i--
	}
	// At most four bytes are converted, which stays on the stack.
	ra, _ := utf8.DecodeRuneInString(string(a[i:min(i+utf8.UTFMax, len(a))]))
	rb, _ := utf8.DecodeRuneInString(string(b[i:min(i+utf8.UTFMax, len(b))]))
	ua, ub := firstUnit(ra), firstUnit(rb)
	if ua != ub {
		return int(ua) - int(ub)
	}
	// Same high surrogate: the low surrogates order as the code points do.
	return int(ra) - int(rb)
}

// firstUnit is the first UTF-16 code unit of r.
func firstUnit(r rune) rune {
	if r >= 0x10000 {
		return 0xD800 + (r-0x10000)>>10
	}
	return r
}
