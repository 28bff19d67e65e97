// Package canon turns JSON into its canonical form under RFC 8785, the JSON
// Canonicalization Scheme (JCS): object members sorted by the UTF-16 code
// units of their names, numbers written the way ECMAScript writes an
// IEEE-754 double, strings with the minimal escaping, and no whitespace.
// Two JSON texts that mean the same I-JSON value canonicalize to the same
// bytes, which is what makes the result usable as a cache key.
//
// Transform canonicalizes raw JSON text. Marshal canonicalizes a value already
// decoded by encoding/json (with Decoder.UseNumber, so numbers keep their
// text). A Canonicalizer does the same while reusing its scratch space, for
// callers that canonicalize on every request; with its ExactIntegers option
// it keeps the digits of integers a double cannot hold, which RFC 8785 alone
// would merge (9007199254740992 and 9007199254740993 write the same).
//
// Input that is not I-JSON (RFC 7493, which RFC 8785 §3.1 requires) is
// rejected with an error that wraps one of the sentinel errors below: invalid
// syntax or UTF-8, duplicate object names, lone surrogates, and numbers whose
// magnitude overflows a double (1e400). Numbers that underflow (1e-400) round
// to zero, as ECMAScript's JSON.parse does.
//
// The package is written by hand rather than wrapping
// github.com/gowebpki/jcs: that library builds a tree of heap nodes, a
// strings.Builder per string and a regular expression match per number, which
// costs tens of allocations for a small request body. This implementation
// keeps the parsed document in a few flat slices that a Canonicalizer reuses,
// and formats numbers with strconv straight into the output. The tests
// cross-check it against gowebpki/jcs on a corpus and under fuzzing.
package canon

import (
	"errors"
	"fmt"
	"slices"
	"unicode/utf8"
)

// Errors wrapped by the errors this package returns. Use errors.Is.
var (
	// ErrSyntax reports input that is not well-formed JSON (RFC 8259),
	// including text after the top-level value and invalid UTF-8.
	ErrSyntax = errors.New("canon: invalid JSON")
	// ErrDuplicateKey reports an object with two members of the same name
	// (after unescaping), which I-JSON forbids (RFC 7493 §2.3).
	ErrDuplicateKey = errors.New("canon: duplicate object member name")
	// ErrLoneSurrogate reports a \u escape of a UTF-16 surrogate that is not
	// part of a valid pair (RFC 7493 §2.1).
	ErrLoneSurrogate = errors.New("canon: lone UTF-16 surrogate in string")
	// ErrNumberRange reports a number whose magnitude is too large for an
	// IEEE-754 double, or a NaN or infinity handed to Marshal
	// (RFC 8785 §3.2.2.3).
	ErrNumberRange = errors.New("canon: number not representable as an IEEE-754 double")
	// ErrTooDeep reports nesting of arrays and objects deeper than MaxDepth.
	ErrTooDeep = errors.New("canon: nesting too deep")
	// ErrUnsupportedType reports a Go value Marshal cannot represent as JSON.
	ErrUnsupportedType = errors.New("canon: unsupported Go type")
)

// MaxDepth is the deepest nesting of arrays and objects accepted, the same
// limit encoding/json applies, so that anything the proxy could decode can be
// canonicalized.
const MaxDepth = 10000

// Transform returns the RFC 8785 canonical form of the JSON text raw.
// Whitespace around the value is allowed; anything else after it is an error.
func Transform(raw []byte) ([]byte, error) {
	var c Canonicalizer
	// Canonical text is rarely longer than its input.
	return c.Append(make([]byte, 0, len(raw)+8), raw)
}

// A Canonicalizer canonicalizes JSON, keeping the scratch space of one call
// for the next. Its zero value is ready to use. It is not safe for concurrent
// use; a server keeps one per goroutine or in a sync.Pool.
type Canonicalizer struct {
	// ExactIntegers, when set, writes an integer literal (no fraction, no
	// exponent) outside [-(2^53)+1, 2^53-1], the range RFC 7493 §2.2 says
	// a double holds exactly, with its own digits instead of as the
	// nearest double (RFC 8785 §3.2.2.3). RFC 8785 alone gives
	// 9007199254740992 and 9007199254740993 the same text; readers that
	// keep integers exact (most JSON libraries outside JavaScript) take
	// them as different values, so a cache key must not merge them. The
	// output is then RFC 8785's for every document without such integers.
	// Off (the zero value) means RFC 8785 exactly.
	ExactIntegers bool

	p parser
	m marshaler
}

// Append appends the RFC 8785 canonical form of the JSON text raw to dst and
// returns the extended slice. On error dst is returned unchanged (its spare
// capacity may have been written to).
func (c *Canonicalizer) Append(dst, raw []byte) ([]byte, error) {
	p := &c.p
	p.reset(raw)
	p.exact = c.ExactIntegers
	root, err := p.parseDocument()
	if err != nil {
		p.release()
		return dst, err
	}
	out := p.write(dst, root)
	p.release()
	return out, nil
}

// kind is the type of a parsed JSON value.
type kind uint8

const (
	kindNull kind = iota
	kindTrue
	kindFalse
	kindNumber
	kindString
	kindArray
	kindObject
)

// node is one parsed value. Scalars point into the input; containers point
// into parser.kids (array elements) or parser.members (object members, sorted).
type node struct {
	kind kind
	// esc is set on a string that contains backslash escapes, which must be
	// decoded before it is written.
	esc bool
	// verbatim is set on a number whose input text is already canonical.
	verbatim bool
	// wide is set on an integer literal a double cannot hold exactly
	// (see Canonicalizer.ExactIntegers); lo, hi hold its text.
	wide bool
	// lo, hi: the input span of a scalar (a string's span excludes its
	// quotes), or the range of a container's children.
	lo, hi int
	// num is the value of a number that is not verbatim.
	num float64
}

// member is one object member. Its decoded name is in.[lo:hi] when esc is
// false, or names[lo:hi] when the raw name had escapes.
type member struct {
	lo, hi int
	esc    bool
	val    int
}

// parser holds one document's parse. The flat slices are reused between
// documents; stack and mstack are work stacks whose segments belong to the
// container being parsed, moved to kids/members when it closes. This keeps
// each child list contiguous without allocating per container, and makes the
// whole parse and write O(n) (plus sorting), whatever the nesting.
type parser struct {
	exact   bool // write wide integers with their digits
	in      []byte
	i       int
	nodes   []node
	kids    []int
	stack   []int
	members []member
	mstack  []member
	names   []byte // decoded names that had escapes
	scratch []byte // a decoded string value while it is written
}

func (p *parser) reset(in []byte) {
	p.in = in
	p.i = 0
	p.nodes = p.nodes[:0]
	p.kids = p.kids[:0]
	p.stack = p.stack[:0]
	p.members = p.members[:0]
	p.mstack = p.mstack[:0]
	p.names = p.names[:0]
	if p.nodes == nil {
		// First guesses that fit a typical request body without regrowth.
		p.nodes = make([]node, 0, 16+len(in)/8)
		p.kids = make([]int, 0, 8+len(in)/32)
		p.stack = make([]int, 0, 8+len(in)/32)
		p.members = make([]member, 0, 8+len(in)/16)
		p.mstack = make([]member, 0, 8+len(in)/16)
	}
}

// release drops the reference to the input and shrinks buffers that one
// huge document made large, so a pooled Canonicalizer does not pin them.
func (p *parser) release() {
	p.in = nil
	const keep = 1 << 16
	if cap(p.nodes) > keep {
		p.nodes = nil
	}
	if cap(p.kids) > keep || cap(p.stack) > keep {
		p.kids, p.stack = nil, nil
	}
	if cap(p.members) > keep || cap(p.mstack) > keep {
		p.members, p.mstack = nil, nil
	}
	if cap(p.names) > keep || cap(p.scratch) > keep {
		p.names, p.scratch = nil, nil
	}
}

func (p *parser) errorf(sentinel error, format string, args ...any) error {
	return fmt.Errorf("%w at offset %d: %s", sentinel, p.i, fmt.Sprintf(format, args...))
}

func (p *parser) parseDocument() (int, error) {
	root, err := p.value(0)
	if err != nil {
		return 0, err
	}
	p.skipSpace()
	if p.i != len(p.in) {
		return 0, p.errorf(ErrSyntax, "unexpected %s after the top-level value", describe(p.in[p.i]))
	}
	return root, nil
}

func (p *parser) skipSpace() {
	for p.i < len(p.in) {
		switch p.in[p.i] {
		case ' ', '\t', '\n', '\r':
			p.i++
		default:
			return
		}
	}
}

// value parses the value at p.i and returns its node index.
func (p *parser) value(depth int) (int, error) {
	p.skipSpace()
	if p.i >= len(p.in) {
		return 0, p.errorf(ErrSyntax, "unexpected end of input")
	}
	switch c := p.in[p.i]; {
	case c == '{':
		return p.object(depth + 1)
	case c == '[':
		return p.array(depth + 1)
	case c == '"':
		lo := p.i + 1
		esc, err := p.scanString()
		if err != nil {
			return 0, err
		}
		p.nodes = append(p.nodes, node{kind: kindString, esc: esc, lo: lo, hi: p.i - 1})
	case c == 't':
		return p.literal("true", kindTrue)
	case c == 'f':
		return p.literal("false", kindFalse)
	case c == 'n':
		return p.literal("null", kindNull)
	case c == '-' || (c >= '0' && c <= '9'):
		n, err := p.number()
		if err != nil {
			return 0, err
		}
		p.nodes = append(p.nodes, n)
	default:
		return 0, p.errorf(ErrSyntax, "unexpected %s", describe(c))
	}
	return len(p.nodes) - 1, nil
}

func (p *parser) literal(word string, k kind) (int, error) {
	if len(p.in)-p.i < len(word) || string(p.in[p.i:p.i+len(word)]) != word {
		return 0, p.errorf(ErrSyntax, "invalid literal")
	}
	p.i += len(word)
	p.nodes = append(p.nodes, node{kind: k})
	return len(p.nodes) - 1, nil
}

func (p *parser) array(depth int) (int, error) {
	if depth > MaxDepth {
		return 0, p.errorf(ErrTooDeep, "more than %d nested arrays and objects", MaxDepth)
	}
	p.i++ // '['
	p.nodes = append(p.nodes, node{kind: kindArray})
	idx := len(p.nodes) - 1
	mark := len(p.stack)
	p.skipSpace()
	if p.i < len(p.in) && p.in[p.i] == ']' {
		p.i++
	} else {
		for {
			child, err := p.value(depth)
			if err != nil {
				return 0, err
			}
			p.stack = append(p.stack, child)
			p.skipSpace()
			if p.i >= len(p.in) {
				return 0, p.errorf(ErrSyntax, "unexpected end of input in array")
			}
			if c := p.in[p.i]; c == ',' {
				p.i++
				continue
			} else if c == ']' {
				p.i++
				break
			} else {
				return 0, p.errorf(ErrSyntax, "expected ',' or ']' in array, found %s", describe(c))
			}
		}
	}
	lo := len(p.kids)
	p.kids = append(p.kids, p.stack[mark:]...)
	p.stack = p.stack[:mark]
	p.nodes[idx].lo, p.nodes[idx].hi = lo, len(p.kids)
	return idx, nil
}

func (p *parser) object(depth int) (int, error) {
	if depth > MaxDepth {
		return 0, p.errorf(ErrTooDeep, "more than %d nested arrays and objects", MaxDepth)
	}
	p.i++ // '{'
	p.nodes = append(p.nodes, node{kind: kindObject})
	idx := len(p.nodes) - 1
	mark := len(p.mstack)
	p.skipSpace()
	if p.i < len(p.in) && p.in[p.i] == '}' {
		p.i++
	} else {
		for {
			p.skipSpace()
			if p.i >= len(p.in) || p.in[p.i] != '"' {
				if p.i >= len(p.in) {
					return 0, p.errorf(ErrSyntax, "unexpected end of input in object")
				}
				return 0, p.errorf(ErrSyntax, "expected a member name, found %s", describe(p.in[p.i]))
			}
			lo := p.i + 1
			esc, err := p.scanString()
			if err != nil {
				return 0, err
			}
			m := member{lo: lo, hi: p.i - 1, esc: esc}
			if esc {
				start := len(p.names)
				p.names = appendUnescaped(p.names, p.in[m.lo:m.hi])
				m.lo, m.hi = start, len(p.names)
			}
			p.skipSpace()
			if p.i >= len(p.in) || p.in[p.i] != ':' {
				return 0, p.errorf(ErrSyntax, "expected ':' after a member name")
			}
			p.i++
			m.val, err = p.value(depth)
			if err != nil {
				return 0, err
			}
			p.mstack = append(p.mstack, m)
			p.skipSpace()
			if p.i >= len(p.in) {
				return 0, p.errorf(ErrSyntax, "unexpected end of input in object")
			}
			if c := p.in[p.i]; c == ',' {
				p.i++
				continue
			} else if c == '}' {
				p.i++
				break
			} else {
				return 0, p.errorf(ErrSyntax, "expected ',' or '}' in object, found %s", describe(c))
			}
		}
	}
	ms := p.mstack[mark:]
	// RFC 8785 §3.2.3: sort members by the UTF-16 code units of their names.
	slices.SortFunc(ms, func(a, b member) int {
		return compareUTF16(p.name(a), p.name(b))
	})
	for k := 1; k < len(ms); k++ {
		if compareUTF16(p.name(ms[k-1]), p.name(ms[k])) == 0 {
			return 0, p.errorf(ErrDuplicateKey, "name %s", quoteForError(p.name(ms[k])))
		}
	}
	lo := len(p.members)
	p.members = append(p.members, ms...)
	p.mstack = p.mstack[:mark]
	p.nodes[idx].lo, p.nodes[idx].hi = lo, len(p.members)
	return idx, nil
}

// name returns the decoded name of m.
func (p *parser) name(m member) []byte {
	if m.esc {
		return p.names[m.lo:m.hi]
	}
	return p.in[m.lo:m.hi]
}

// scanString validates the string whose opening quote is at p.i and leaves
// p.i after its closing quote. It reports whether the string has escapes.
func (p *parser) scanString() (esc bool, err error) {
	in := p.in
	i := p.i + 1
	for {
		// Fast path: a run of ASCII that needs no attention.
		for i < len(in) {
			c := in[i]
			if c < 0x20 || c == '"' || c == '\\' || c >= utf8.RuneSelf {
				break
			}
			i++
		}
		if i >= len(in) {
			p.i = i
			return false, p.errorf(ErrSyntax, "unterminated string")
		}
		switch c := in[i]; {
		case c == '"':
			p.i = i + 1
			return esc, nil
		case c == '\\':
			esc = true
			if i+1 >= len(in) {
				p.i = i
				return false, p.errorf(ErrSyntax, "unterminated escape")
			}
			switch in[i+1] {
			case '"', '\\', '/', 'b', 'f', 'n', 'r', 't':
				i += 2
			case 'u':
				r, ok := hex4(in[i+2:])
				if !ok {
					p.i = i
					return false, p.errorf(ErrSyntax, "invalid \\u escape")
				}
				switch {
				case r >= 0xD800 && r <= 0xDBFF:
					lo, ok := hex4(in[min(i+8, len(in)):])
					if i+7 >= len(in) || in[i+6] != '\\' || in[i+7] != 'u' || !ok || lo < 0xDC00 || lo > 0xDFFF {
						p.i = i
						return false, p.errorf(ErrLoneSurrogate, "high surrogate \\u%04x without a low surrogate", r)
					}
					i += 12
				case r >= 0xDC00 && r <= 0xDFFF:
					p.i = i
					return false, p.errorf(ErrLoneSurrogate, "low surrogate \\u%04x without a high surrogate", r)
				default:
					i += 6
				}
			default:
				p.i = i
				return false, p.errorf(ErrSyntax, "invalid escape %q", in[i:i+2])
			}
		case c < 0x20:
			p.i = i
			return false, p.errorf(ErrSyntax, "unescaped control character 0x%02x in string", c)
		default:
			// utf8.DecodeRune rejects overlong forms and encoded surrogates.
			r, size := utf8.DecodeRune(in[i:])
			if r == utf8.RuneError && size <= 1 {
				p.i = i
				return false, p.errorf(ErrSyntax, "invalid UTF-8 in string")
			}
			i += size
		}
	}
}

// hex4 decodes four hex digits at the start of b.
func hex4(b []byte) (rune, bool) {
	if len(b) < 4 {
		return 0, false
	}
	var r rune
	for _, c := range b[:4] {
		var d byte
		switch {
		case c >= '0' && c <= '9':
			d = c - '0'
		case c >= 'a' && c <= 'f':
			d = c - 'a' + 10
		case c >= 'A' && c <= 'F':
			d = c - 'A' + 10
		default:
			return 0, false
		}
		r = r<<4 | rune(d)
	}
	return r, true
}

// appendUnescaped appends the decoded form of a validated string body.
func appendUnescaped(dst, s []byte) []byte {
	for i := 0; i < len(s); {
		c := s[i]
		if c != '\\' {
			j := i + 1
			for j < len(s) && s[j] != '\\' {
				j++
			}
			dst = append(dst, s[i:j]...)
			i = j
			continue
		}
		switch s[i+1] {
		case 'b':
			dst = append(dst, '\b')
		case 'f':
			dst = append(dst, '\f')
		case 'n':
			dst = append(dst, '\n')
		case 'r':
			dst = append(dst, '\r')
		case 't':
			dst = append(dst, '\t')
		case 'u':
			r, _ := hex4(s[i+2:])
			if r >= 0xD800 && r <= 0xDBFF {
				lo, _ := hex4(s[i+8:])
				r = 0x10000 + (r-0xD800)<<10 + (lo - 0xDC00)
				i += 6
			}
			dst = utf8.AppendRune(dst, r)
			i += 6
			continue
		default: // '"', '\\', '/'
			dst = append(dst, s[i+1])
		}
		i += 2
	}
	return dst
}

// write appends the canonical text of node idx.
func (p *parser) write(dst []byte, idx int) []byte {
	n := &p.nodes[idx]
	switch n.kind {
	case kindNull:
		return append(dst, "null"...)
	case kindTrue:
		return append(dst, "true"...)
	case kindFalse:
		return append(dst, "false"...)
	case kindNumber:
		if n.verbatim || (n.wide && p.exact) {
			return append(dst, p.in[n.lo:n.hi]...)
		}
		return appendNumber(dst, n.num)
	case kindString:
		if !n.esc {
			// No escapes and no characters that need one: already canonical.
			dst = append(dst, '"')
			dst = append(dst, p.in[n.lo:n.hi]...)
			return append(dst, '"')
		}
		p.scratch = appendUnescaped(p.scratch[:0], p.in[n.lo:n.hi])
		return appendQuoted(dst, p.scratch)
	case kindArray:
		dst = append(dst, '[')
		for k := n.lo; k < n.hi; k++ {
			if k > n.lo {
				dst = append(dst, ',')
			}
			dst = p.write(dst, p.kids[k])
		}
		return append(dst, ']')
	default: // kindObject
		dst = append(dst, '{')
		lo, hi := n.lo, n.hi
		for k := lo; k < hi; k++ {
			if k > lo {
				dst = append(dst, ',')
			}
			m := p.members[k]
			if m.esc {
				dst = appendQuoted(dst, p.names[m.lo:m.hi])
			} else {
				dst = append(dst, '"')
				dst = append(dst, p.in[m.lo:m.hi]...)
				dst = append(dst, '"')
			}
			dst = append(dst, ':')
			dst = p.write(dst, m.val)
		}
		return append(dst, '}')
	}
}

// describe names a byte for an error message without echoing input text.
func describe(c byte) string {
	if c >= 0x21 && c < 0x7f {
		return fmt.Sprintf("%q", rune(c))
	}
	return fmt.Sprintf("byte 0x%02x", c)
}

// quoteForError quotes at most 32 bytes of s for an error message, so a hostile
// document cannot write megabytes into a log line.
func quoteForError(s []byte) string {
	const limit = 32
	if len(s) > limit {
		return fmt.Sprintf("%q (truncated from %d bytes)", s[:limit], len(s))
	}
	return fmt.Sprintf("%q", s)
}
