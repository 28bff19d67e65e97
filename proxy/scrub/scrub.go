// Package scrub masks credentials in bytes that come from an upstream, so an
// API that repeats the key it was sent (some do, in their 401 bodies) cannot
// pass it on to a client, a log line or a stored answer.
//
// A Scrubber looks for every form in which a key is seen repeated:
//
//   - the key as is, and as JSON escapes it ("/" as "\/" too);
//   - its base64, standard and URL-safe, padded or not, wherever the key
//     stands in the encoded text: alone, in "Bearer <key>", in a Basic
//     credential "user:<key>". The encoding of bytes at an offset depends
//     only on the offset modulo 3, so for each of the three alignments the
//     characters that encode the key's bytes alone are a fixed string; that
//     core is what is masked (a character or two at each end, shared with
//     the neighbouring bytes, may stay).
//
// Each match is overwritten with '*' of the same length, so lengths (a
// Content-Length, offsets in a JSON document) do not change. Forms shorter
// than MinLen are not looked for: they would match ordinary text.
package scrub

import (
	"bytes"
	"encoding/base64"
	"encoding/json"
	"io"
	"net/http"
	"net/url"
	"slices"
	"strings"
)

// MinLen is the shortest form searched for. A key shorter than that is not
// scrubbed at all (New reports it).
const MinLen = 8

// mask replaces a match, byte for byte.
const mask = '*'

// Scrubber masks a fixed set of secrets. A nil *Scrubber masks nothing;
// its methods are safe for concurrent use.
type Scrubber struct {
	forms  [][]byte // distinct, longest first
	maxLen int
}

// New returns a Scrubber for secrets (empty ones are ignored) and the
// secrets too short to be scrubbed. It returns nil when there is nothing to
// look for.
func New(secrets []string) (s *Scrubber, tooShort []string) {
	seen := map[string]bool{}
	var forms [][]byte
	add := func(f string) {
		if len(f) >= MinLen && !seen[f] {
			seen[f] = true
			forms = append(forms, []byte(f))
		}
	}
	for _, secret := range secrets {
		if secret == "" {
			continue
		}
		if len(secret) < MinLen {
			tooShort = append(tooShort, secret)
			continue
		}
		for _, f := range Forms(secret) {
			add(f)
		}
	}
	if len(forms) == 0 {
		return nil, tooShort
	}
	slices.SortFunc(forms, func(a, b []byte) int { return len(b) - len(a) })
	return &Scrubber{forms: forms, maxLen: len(forms[0])}, tooShort
}

// Forms lists the strings a Scrubber masks for secret (see the package
// doc), including those shorter than MinLen.
func Forms(secret string) []string {
	out := []string{secret}
	if b, err := json.Marshal(secret); err == nil {
		out = append(out, string(b[1:len(b)-1]))
	}
	out = append(out, strings.ReplaceAll(secret, "/", `\/`), url.QueryEscape(secret), url.PathEscape(secret))
	key := []byte(secret)
	for _, enc := range []*base64.Encoding{base64.StdEncoding, base64.URLEncoding} {
		for align := range 3 {
			// align bytes before the key; characters [lo, hi) of the
			// encoding depend on the key's bytes alone.
			buf := append(make([]byte, align), key...)
			text := enc.EncodeToString(buf)
			lo := (8*align + 5) / 6
			hi := 8 * (align + len(key)) / 6
			if hi > lo {
				core := text[lo:hi]
				out = append(out, core, strings.ReplaceAll(core, "/", `\/`))
			}
		}
	}
	return out
}

// Bytes masks every secret in b, in place, and returns b.
func (s *Scrubber) Bytes(b []byte) []byte {
	if s == nil {
		return b
	}
	for _, f := range s.forms {
		for from := 0; ; {
			i := bytes.Index(b[from:], f)
			if i < 0 {
				break
			}
			i += from
			for j := range f {
				b[i+j] = mask
			}
			from = i + len(f)
		}
	}
	return b
}

// String returns v with every secret masked.
func (s *Scrubber) String(v string) string {
	if s == nil || !s.contains([]byte(v)) {
		return v
	}
	return string(s.Bytes([]byte(v)))
}

// contains reports whether b holds any form.
func (s *Scrubber) contains(b []byte) bool {
	for _, f := range s.forms {
		if bytes.Contains(b, f) {
			return true
		}
	}
	return false
}

// Header masks every secret in the values of h, in place.
func (s *Scrubber) Header(h http.Header) {
	if s == nil {
		return
	}
	for k, vs := range h {
		for i, v := range vs {
			vs[i] = s.String(v)
		}
		h[k] = vs
	}
}

// held returns how many bytes at the end of b may be the start of a form
// that the next bytes complete: the longest such suffix.
func (s *Scrubber) held(b []byte) int {
	hold := 0
	for _, f := range s.forms {
		start := max(0, len(b)-len(f)+1)
		for i := start; i < len(b); i++ {
			if len(b)-i <= hold {
				break // no longer than what is held already
			}
			if b[i] == f[0] && bytes.HasPrefix(f, b[i:]) {
				hold = len(b) - i
				break
			}
		}
	}
	return hold
}

// Reader returns a reader of r's bytes with every secret masked. It holds
// back only bytes that may begin a secret the next read completes, so a
// stream's events pass at once. Closing it closes r when r is a Closer.
func (s *Scrubber) Reader(r io.Reader) io.ReadCloser {
	if s == nil {
		if rc, ok := r.(io.ReadCloser); ok {
			return rc
		}
		return io.NopCloser(r)
	}
	return &reader{s: s, r: r}
}

// reader is a Scrubber's masking reader. It reads into the caller's
// buffer after the bytes it held back last time, masks the lot there, and
// keeps back again only a tail that may begin a form.
type reader struct {
	s     *Scrubber
	r     io.Reader
	carry []byte // held back: masked, maybe the start of a form
	err   error  // the reader underneath ended; carry is then all to give
}

func (rd *reader) Read(p []byte) (int, error) {
	if len(p) == 0 {
		return 0, nil
	}
	for {
		if rd.err != nil {
			n := copy(p, rd.carry)
			rd.carry = rd.carry[:copy(rd.carry, rd.carry[n:])]
			if len(rd.carry) == 0 {
				return n, rd.err
			}
			return n, nil
		}
		if len(p) <= len(rd.carry) {
			// No room to read after the held bytes: read into carry and
			// give out what may go.
			if ready := rd.fill(); ready > 0 {
				n := copy(p, rd.carry[:ready])
				rd.carry = rd.carry[:copy(rd.carry, rd.carry[n:])]
				return n, nil
			}
			continue
		}
		h := copy(p, rd.carry)
		n, err := rd.r.Read(p[h:])
		total := h + n
		rd.s.Bytes(p[:total])
		if err != nil {
			rd.err = err
			rd.carry = rd.carry[:0]
			return total, errIfDone(total, err)
		}
		hold := rd.s.held(p[:total])
		rd.carry = append(rd.carry[:0], p[total-hold:total]...)
		if total > hold {
			return total - hold, nil
		}
	}
}

// fill reads more into carry when the caller's buffer cannot hold it, and
// returns how many bytes at its start may be given out (0 once the reader
// underneath has ended: Read then gives out all of carry).
func (rd *reader) fill() int {
	buf := make([]byte, len(rd.carry)+max(512, rd.s.maxLen))
	h := copy(buf, rd.carry)
	n, err := rd.r.Read(buf[h:])
	rd.carry = rd.s.Bytes(buf[:h+n])
	rd.err = err
	if err != nil {
		return 0
	}
	return len(rd.carry) - rd.s.held(rd.carry)
}

// errIfDone is the error to return with n bytes at the end of the input:
// none while bytes are given out with it (io.Reader allows either, and
// some callers stop at the first error).
func errIfDone(n int, err error) error {
	if n > 0 {
		return nil
	}
	return err
}

// Close closes the reader underneath, when it is a Closer.
func (rd *reader) Close() error {
	if c, ok := rd.r.(io.Closer); ok {
		return c.Close()
	}
	return nil
}
