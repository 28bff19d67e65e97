package runs

import (
	"bytes"
	"context"
	"crypto/sha256"
	"fmt"
	"hash"
	"io"
)

// An archive ends with a zstd skippable frame (which zstd tools and
// decoders pass over) holding the SHA-256 of every byte before it. zstd's
// own content checksum catches damage to the compressed data, but a few
// bits of a frame's header (its window size, say) can change without
// changing what it decodes to; the trailer makes every change to the file
// detectable.
//
//	[0:4]  skippable frame magic 0x184D2A5E, little-endian
//	[4:8]  payload size 32, little-endian
//	[8:40] SHA-256 of the archive before the trailer
const trailerLen = 40

// errTooBig is what a trailerReader fails with past its limit.
var errTooBig = fmt.Errorf("%w: compressed archive is larger than the import limit", ErrTooLarge)

var trailerHead = []byte{0x5e, 0x2a, 0x4d, 0x18, 32, 0, 0, 0}

// hashWriter hashes what it writes.
type hashWriter struct {
	w io.Writer
	h hash.Hash
}

func (hw *hashWriter) Write(p []byte) (int, error) {
	n, err := hw.w.Write(p)
	hw.h.Write(p[:n])
	return n, err
}

// writeTrailer ends an archive whose bytes so far hw hashed.
func writeTrailer(hw *hashWriter) error {
	t := append(bytes.Clone(trailerHead), hw.h.Sum(nil)...)
	_, err := hw.w.Write(t)
	return err
}

// trailerReader passes its source through and hashes all of it but the
// last trailerLen bytes, which it keeps for check. It also stops reading
// once ctx is done or more than max bytes came (zstd skippable frames
// could otherwise make a small archive an endless read).
type trailerReader struct {
	ctx  context.Context
	r    io.Reader
	max  int64
	h    hash.Hash
	tail []byte
	err  error // the source's first error other than io.EOF
	// tooBig is set once more than max bytes came.
	tooBig bool
}

func newTrailerReader(ctx context.Context, r io.Reader, max int64) *trailerReader {
	return &trailerReader{ctx: ctx, r: r, max: max, h: sha256.New(), tail: make([]byte, 0, 2*trailerLen)}
}

func (t *trailerReader) Read(p []byte) (int, error) {
	if err := t.ctx.Err(); err != nil {
		return 0, err
	}
	if t.max < 0 {
		t.tooBig = true
		return 0, errTooBig
	}
	n, err := t.r.Read(p)
	t.max -= int64(n)
	if err != nil && err != io.EOF && t.err == nil {
		t.err = err
	}
	data := p[:n]
	// Hash everything except the newest trailerLen bytes seen.
	if over := len(t.tail) + len(data) - trailerLen; over > 0 {
		fromTail := min(over, len(t.tail))
		t.h.Write(t.tail[:fromTail])
		t.tail = append(t.tail[:0], t.tail[fromTail:]...)
		t.h.Write(data[:over-fromTail])
		data = data[over-fromTail:]
	}
	t.tail = append(t.tail, data...)
	return n, err
}

// check reads the source to its end and reports whether it ended with the
// trailer of what came before.
func (t *trailerReader) check() bool {
	if _, err := io.Copy(io.Discard, t); err != nil {
		return false
	}
	if len(t.tail) != trailerLen || !bytes.Equal(t.tail[:8], trailerHead) {
		return false
	}
	return bytes.Equal(t.tail[8:], t.h.Sum(nil))
}
