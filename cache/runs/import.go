package runs

import (
	"archive/tar"
	"bufio"
	"bytes"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"hash"
	"io"
	"time"

	"github.com/klauspost/compress/zstd"
)

// Defaults of the ImportOptions limits.
const (
	// DefaultMaxArchiveBytes bounds the uncompressed archive (tar headers
	// included), and so what one Import writes.
	DefaultMaxArchiveBytes = 256 << 20
	// DefaultMaxMembers bounds the members (distinct bodies + 2) of an
	// archive.
	DefaultMaxMembers = 1 << 18
	// DefaultMaxEntries bounds the entries of an archive. Import keeps a
	// count per distinct request key and a mark per body while it reads, so
	// this and DefaultMaxMembers bound its memory besides the few MiB it
	// buffers.
	DefaultMaxEntries = 1 << 20
	// maxWindow is the largest zstd window Import accepts, which bounds
	// the decoder's memory; Export writes 8 MiB windows at most.
	maxWindow = 8 << 20
	// manifestPerMember bounds the manifest's size: a fixed part plus this
	// much per member it may list.
	manifestPerMember = 256
	// stageBuffer is how much Import buffers before it writes to the
	// backend: small archives go in one write, large ones in pieces.
	stageBuffer = 4 << 20
	// entriesBatch is how many entries Import hands the backend at once.
	entriesBatch = 1024
	// maxEntryLine bounds one line of the entries member (Export writes
	// one entry a line, at most a few KiB even with every label at its
	// longest and escaped).
	maxEntryLine = 64 << 10
)

// ImportOptions configure Import. The zero value imports under the
// archive's run id, refuses an existing run, and applies the default
// limits; each limit's zero means its default.
type ImportOptions struct {
	// As is the run id to import under; empty means the archive's.
	As string
	// Replace lets Import overwrite a run the team already has (in the same
	// single write); otherwise that fails with ErrExists.
	Replace bool
	// MaxBytes bounds the uncompressed archive. 0 means
	// DefaultMaxArchiveBytes.
	MaxBytes int64
	// MaxMembers bounds the archive's members. 0 means DefaultMaxMembers.
	MaxMembers int
	// MaxBodyBytes bounds each body. 0 means MaxBodyBytes.
	MaxBodyBytes int64
	// MaxEntries bounds the archive's entries. 0 means DefaultMaxEntries.
	MaxEntries int64
}

// sink is what Import needs from a backend: a place to write a run into as
// it is read, invisible until it commits.
type sink interface {
	// stage checks that team may import run (ErrExists unless replace,
	// a *QuotaError if need more bytes do not fit its quota), reserves need
	// bytes of the quota, and returns the place to write the run into.
	stage(ctx context.Context, team, run string, replace bool, need int64) (staging, error)
}

// staging is a run being imported. Its methods are called in the order of
// the archive (entries, then bodies), each body's chunks in order; nothing
// is visible to readers until commit, and abort removes all of it.
type staging interface {
	// entries adds records, in Seq order.
	entries(ctx context.Context, recs []record) error
	// body adds the body of raw (its SHA-256): the whole body when chunk is
	// -1, else its chunk-th piece of bodyChunk bytes (the last shorter).
	// data may be kept until commit.
	body(ctx context.Context, raw []byte, chunk int, data []byte) error
	// commit makes the run visible with tally t in one write, replacing the
	// team's run of that id if replace, and releases the reservation; it
	// fails with ErrExists or a *QuotaError if the team changed meanwhile.
	commit(ctx context.Context, t *tally) error
	// abort removes what was written and releases the reservation.
	abort()
}

// stageError marks an error of the backend while staging, which is not
// the archive's fault.
type stageError struct{ err error }

func (e *stageError) Error() string { return e.err.Error() }
func (e *stageError) Unwrap() error { return e.err }

// importRun reads the archive from r, checking it as it goes, into a
// staging run of dst that it commits under team once everything checked.
func importRun(ctx context.Context, dst sink, team string, r io.Reader, opts ImportOptions) (Summary, error) {
	if err := validTeam(team); err != nil {
		return Summary{}, err
	}
	if opts.As != "" {
		if err := ValidID(opts.As); err != nil {
			return Summary{}, err
		}
	}
	ar, err := openArchive(ctx, r, opts)
	if err != nil {
		return Summary{}, err
	}
	defer ar.close()
	run := cmp.Or(opts.As, ar.man.Run)
	st, err := dst.stage(ctx, team, run, opts.Replace, ar.need())
	if err != nil {
		return Summary{}, err
	}
	committed := false
	defer func() {
		if !committed {
			st.abort()
		}
	}()
	t, err := ar.copyTo(st)
	if err != nil {
		return Summary{}, ar.classify(err)
	}
	if err := st.commit(ctx, &t); err != nil {
		return Summary{}, err
	}
	committed = true
	return t.summary(team, run), nil
}

// corrupt returns an error wrapping ErrCorruptArchive.
func corrupt(format string, args ...any) error {
	return fmt.Errorf("%w: %s", ErrCorruptArchive, fmt.Sprintf(format, args...))
}

// tooLarge returns an error wrapping ErrTooLarge.
func tooLarge(format string, args ...any) error {
	return fmt.Errorf("%w: %s", ErrTooLarge, fmt.Sprintf(format, args...))
}

// limitReader fails once more than n bytes pass through it: the bound on
// the inflated archive, checked as it is inflated.
type limitReader struct {
	r io.Reader
	n int64
}

func (l *limitReader) Read(p []byte) (int, error) {
	if l.n < 0 {
		return 0, tooLarge("uncompressed archive is larger than the import limit")
	}
	n, err := l.r.Read(p)
	l.n -= int64(n)
	if l.n < 0 {
		return 0, tooLarge("uncompressed archive is larger than the import limit")
	}
	return n, err
}

// archiveReader reads an archive member by member. It refuses, with an
// error wrapping ErrCorruptArchive: a damaged or truncated zstd stream or
// tar; a file whose trailer is missing or does not match; members other
// than manifest.json, entries and the listed bodies, or out of the
// manifest's order, or duplicated, or of another type than a regular file;
// a format name or version it does not know; a member whose size or
// SHA-256 is not the manifest's; entries that break Record's rules, whose
// Seq is not 1..n in order, whose occurrences are not 1..k per key in
// order, or that name a body the archive lacks; bodies no entry uses; and
// summary figures that are not the entries' sums. It refuses with
// ErrTooLarge an archive past a limit: the declared sizes are checked
// against the limits as soon as the manifest is read, before any other
// member is inflated, and the inflated bytes are counted as they come.
type archiveReader struct {
	ctx        context.Context
	src        *trailerReader
	zr         *zstd.Decoder
	lim        *limitReader
	tr         *tar.Reader
	man        manifest
	budget     int64 // uncompressed bytes left for members
	maxEntries int64
	sizes      map[string]int64 // declared body sizes by ref
}

// openArchive starts reading an archive and reads its manifest.
func openArchive(ctx context.Context, r io.Reader, opts ImportOptions) (*archiveReader, error) {
	maxBytes := cmp.Or(opts.MaxBytes, DefaultMaxArchiveBytes)
	maxMembers := cmp.Or(opts.MaxMembers, DefaultMaxMembers)
	maxBody := cmp.Or(opts.MaxBodyBytes, MaxBodyBytes)
	// Compressed, an archive is smaller than the tar it holds, bar zstd's
	// few bytes of framing per block.
	src := newTrailerReader(ctx, r, maxBytes+maxBytes/64+4096)
	// The window bound holds for a single-segment frame (whose window is
	// its declared size) only through the memory bound.
	zr, err := zstd.NewReader(src, zstd.WithDecoderConcurrency(1), zstd.WithDecoderLowmem(true),
		zstd.WithDecoderMaxWindow(maxWindow), zstd.WithDecoderMaxMemory(maxWindow))
	if err != nil {
		return nil, fmt.Errorf("runs: import: %w", err)
	}
	ar := &archiveReader{ctx: ctx, src: src, zr: zr, lim: &limitReader{r: zr, n: maxBytes}, budget: maxBytes,
		maxEntries: cmp.Or(opts.MaxEntries, DefaultMaxEntries)}
	ar.tr = tar.NewReader(ar.lim)
	if err := ar.readManifest(maxMembers, maxBody); err != nil {
		ar.close()
		return nil, ar.classify(err)
	}
	return ar, nil
}

func (ar *archiveReader) close() { ar.zr.Close() }

// classify turns an error met while reading into the one Import returns:
// the source's own failure, the context's end, a limit, or a corrupt
// archive; a backend's error stays as it is.
func (ar *archiveReader) classify(err error) error {
	var se *stageError
	switch {
	case errors.As(err, &se):
		return se.err
	case ar.src.tooBig:
		return errTooBig
	case ar.src.err != nil:
		return fmt.Errorf("runs: import: read archive: %w", ar.src.err)
	}
	if ctxErr := ar.ctx.Err(); ctxErr != nil {
		return ctxErr
	}
	switch {
	case errors.Is(err, ErrTooLarge) || errors.Is(err, ErrCorruptArchive):
		return err
	case errors.Is(err, zstd.ErrWindowSizeExceeded) || errors.Is(err, zstd.ErrDecoderSizeExceeded):
		return fmt.Errorf("%w: zstd window past %d bytes: %w", ErrTooLarge, maxWindow, err)
	}
	return fmt.Errorf("%w: %w", ErrCorruptArchive, err)
}

// member positions the reader at the next member, which must be called
// name and, if size is not -1, be size bytes long.
func (ar *archiveReader) member(name string, size int64) (int64, error) {
	if err := ar.ctx.Err(); err != nil {
		return 0, err
	}
	hdr, err := ar.tr.Next()
	if err == io.EOF {
		return 0, corrupt("archive ends before member %q", name)
	}
	if err != nil {
		return 0, fmt.Errorf("reading member %q: %w", name, err)
	}
	switch {
	case hdr.Name != name:
		return 0, corrupt("member %.80q where %q belongs", hdr.Name, name)
	case hdr.Typeflag != tar.TypeReg:
		return 0, corrupt("member %q is of tar type %q, not a regular file", name, hdr.Typeflag)
	case size >= 0 && hdr.Size != size:
		return 0, corrupt("member %q is %d bytes, the manifest says %d", name, hdr.Size, size)
	case hdr.Size < 0:
		return 0, corrupt("member %q has size %d", name, hdr.Size)
	case hdr.Size > ar.budget:
		return 0, tooLarge("member %q of %d bytes is past the import limit", name, hdr.Size)
	}
	ar.budget -= hdr.Size
	return hdr.Size, nil
}

// readManifest reads and checks the manifest, and checks the sizes it
// declares against the limits.
func (ar *archiveReader) readManifest(maxMembers int, maxBody int64) error {
	size, err := ar.member(manifestName, -1)
	if err != nil {
		return err
	}
	if limit := int64(64<<10) + int64(maxMembers)*manifestPerMember; size > limit {
		return tooLarge("manifest of %d bytes, the import limit is %d", size, limit)
	}
	data := make([]byte, size)
	if _, err := io.ReadFull(ar.tr, data); err != nil {
		return fmt.Errorf("reading the manifest: %w", err)
	}
	m := &ar.man
	d := json.NewDecoder(bytes.NewReader(data))
	d.DisallowUnknownFields()
	if err := d.Decode(m); err != nil {
		return corrupt("manifest: %v", err)
	}
	if _, err := d.Token(); err != io.EOF {
		return corrupt("manifest: data after the JSON object")
	}
	switch {
	case m.Format != archiveFormat:
		return corrupt("format %.40q, want %q", m.Format, archiveFormat)
	case m.Version != archiveVersion:
		return corrupt("format version %d, this build reads %d", m.Version, archiveVersion)
	case m.Entries < 1:
		return corrupt("manifest counts %d entries", m.Entries)
	case m.Entries > ar.maxEntries:
		return tooLarge("%d entries, the import limit is %d", m.Entries, ar.maxEntries)
	case len(m.Members) < 2:
		return corrupt("manifest lists %d members, want entries and at least one body", len(m.Members))
	case len(m.Members)+1 > maxMembers:
		return tooLarge("%d members, the import limit is %d", len(m.Members)+1, maxMembers)
	}
	if err := ValidID(m.Run); err != nil {
		return corrupt("manifest: %v", err)
	}
	ar.sizes = make(map[string]int64, len(m.Members)-1)
	names := make(map[string]bool, len(m.Members))
	var total int64
	for i, mb := range m.Members {
		if names[mb.Name] {
			return corrupt("member %.80q is listed twice", mb.Name)
		}
		names[mb.Name] = true
		if _, err := rawRef(mb.SHA256); err != nil {
			return corrupt("member %.80q: bad sha256 %.70q", mb.Name, mb.SHA256)
		}
		switch {
		case i == 0 && mb.Name != entriesName:
			return corrupt("first listed member is %.80q, want %q", mb.Name, entriesName)
		case i > 0 && mb.Name != bodyPrefix+mb.SHA256:
			return corrupt("member %.80q is not named %q", mb.Name, bodyPrefix+mb.SHA256)
		case mb.Size < 0:
			return corrupt("member %.80q has size %d", mb.Name, mb.Size)
		case i > 0 && mb.Size > maxBody:
			return tooLarge("body %.16s… is %d bytes, the import limit is %d", mb.SHA256, mb.Size, maxBody)
		}
		if i > 0 {
			ar.sizes[mb.SHA256] = mb.Size
		}
		// Each member also takes a tar header, padded to 512 bytes.
		total += mb.Size + 1024
		if total > ar.budget {
			return tooLarge("members total more than the import limit of %d bytes", ar.budget)
		}
	}
	return nil
}

// need is what the run will hold, estimated from the manifest: its bodies,
// and its entries at about their size as JSON lines (a few hundred bytes
// each, as stored). commit counts it exactly.
func (ar *archiveReader) need() int64 {
	var n int64
	for _, mb := range ar.man.Members {
		n += mb.Size
	}
	return n
}

// copyTo reads the entries and bodies into st, checking each, and then the
// rest of the archive, and returns the run's recomputed tally.
func (ar *archiveReader) copyTo(st staging) (tally, error) {
	t, used, err := ar.copyEntries(st)
	if err != nil {
		return tally{}, err
	}
	if len(used) != len(ar.sizes) {
		return tally{}, corrupt("%d bodies no entry uses", len(ar.sizes)-len(used))
	}
	for _, mb := range ar.man.Members[1:] {
		if err := ar.copyBody(st, mb); err != nil {
			return tally{}, err
		}
	}
	if hdr, err := ar.tr.Next(); err != io.EOF {
		if err == nil {
			return tally{}, corrupt("unexpected member %.80q after the last listed one", hdr.Name)
		}
		return tally{}, corrupt("after the last member: %v", err)
	}
	// Read the stream to its end: that checks the zstd checksum and finds
	// truncation or data after the tar's end.
	rest, err := io.Copy(io.Discard, ar.lim)
	if err != nil {
		return tally{}, fmt.Errorf("after the tar: %w", err)
	}
	if rest != 0 {
		return tally{}, corrupt("%d bytes after the end of the tar", rest)
	}
	if !ar.src.check() {
		return tally{}, corrupt("the file does not match its trailing SHA-256 (damaged, truncated or extended)")
	}
	return t, nil
}

// copyEntries reads the entries member into st in batches, checking them
// against each other and the manifest, and returns their tally and the
// bodies they use.
func (ar *archiveReader) copyEntries(st staging) (tally, map[string]bool, error) {
	m := ar.man.Members[0]
	if _, err := ar.member(m.Name, m.Size); err != nil {
		return tally{}, nil, err
	}
	h := sha256.New()
	lines := bufio.NewReaderSize(io.TeeReader(ar.tr, h), maxEntryLine)
	var (
		t     tally
		occ   = map[string]int64{}
		used  = make(map[string]bool, len(ar.sizes))
		batch = make([]record, 0, entriesBatch)
		seq   int64
	)
	flush := func() error {
		if len(batch) == 0 {
			return nil
		}
		if err := st.entries(ar.ctx, batch); err != nil {
			return &stageError{err}
		}
		batch = batch[:0]
		return nil
	}
	for {
		line, err := lines.ReadSlice('\n')
		switch {
		case errors.Is(err, bufio.ErrBufferFull):
			return tally{}, nil, corrupt("entry %d is longer than %d bytes", seq+1, maxEntryLine)
		case err == io.EOF && len(bytes.TrimSpace(line)) == 0:
		case err != nil && err != io.EOF:
			return tally{}, nil, fmt.Errorf("reading member %q: %w", m.Name, err)
		}
		if len(bytes.TrimSpace(line)) == 0 {
			if err == io.EOF {
				break
			}
			continue
		}
		var ae archEntry
		d := json.NewDecoder(bytes.NewReader(line))
		d.DisallowUnknownFields()
		if err := d.Decode(&ae); err != nil {
			return tally{}, nil, corrupt("entry %d: %v", seq+1, err)
		}
		if _, err := d.Token(); err != io.EOF {
			return tally{}, nil, corrupt("entry %d: more than one JSON object on its line", seq+1)
		}
		r := ae.record()
		seq++
		switch {
		case seq > ar.man.Entries:
			return tally{}, nil, corrupt("more entries than the manifest's %d", ar.man.Entries)
		case r.Seq != seq:
			return tally{}, nil, corrupt("entry %d has seq %d", seq, r.Seq)
		case r.Occurrence != occ[r.Key]+1:
			return tally{}, nil, corrupt("entry %d is occurrence %d of its key, want %d", seq, r.Occurrence, occ[r.Key]+1)
		}
		if err := validRecord(&r); err != nil {
			return tally{}, nil, corrupt("entry %d: %v", seq, err)
		}
		size, ok := ar.sizes[r.Ref]
		if !ok {
			return tally{}, nil, corrupt("entry %d uses body %.16s…, which the archive lacks", seq, r.Ref)
		}
		occ[r.Key]++
		t.add(&r, r.Occurrence == 1, !used[r.Ref], int(size))
		used[r.Ref] = true
		batch = append(batch, r)
		if len(batch) == entriesBatch {
			if err := flush(); err != nil {
				return tally{}, nil, err
			}
		}
		if err == io.EOF {
			break
		}
	}
	switch {
	case hex.EncodeToString(h.Sum(nil)) != m.SHA256:
		return tally{}, nil, corrupt("member %q does not match its SHA-256", m.Name)
	case seq != ar.man.Entries:
		return tally{}, nil, corrupt("%d entries, the manifest says %d", seq, ar.man.Entries)
	case !newArchSummary(t).equal(ar.man.Summary):
		return tally{}, nil, corrupt("summary figures do not match the entries")
	}
	return t, used, flush()
}

// copyBody reads one body member into st, whole if it is at most
// bodyChunk bytes, else in chunks, checking its SHA-256 at the end.
func (ar *archiveReader) copyBody(st staging, mb member) error {
	if _, err := ar.member(mb.Name, mb.Size); err != nil {
		return err
	}
	raw, _ := rawRef(mb.SHA256)
	h := sha256.New()
	if mb.Size <= bodyChunk {
		data := make([]byte, mb.Size)
		if err := ar.readChunk(h, mb.Name, data); err != nil {
			return err
		}
		if err := ar.checkSum(h, mb); err != nil {
			return err
		}
		return ar.stage(st.body(ar.ctx, raw, -1, data))
	}
	for i, left := 0, mb.Size; left > 0; i++ {
		data := make([]byte, min(left, bodyChunk))
		if err := ar.readChunk(h, mb.Name, data); err != nil {
			return err
		}
		left -= int64(len(data))
		if left == 0 {
			if err := ar.checkSum(h, mb); err != nil {
				return err
			}
		}
		if err := ar.stage(st.body(ar.ctx, raw, i, data)); err != nil {
			return err
		}
	}
	return nil
}

func (ar *archiveReader) readChunk(h hash.Hash, name string, data []byte) error {
	if _, err := io.ReadFull(ar.tr, data); err != nil {
		return fmt.Errorf("reading member %q: %w", name, err)
	}
	h.Write(data)
	return nil
}

func (ar *archiveReader) checkSum(h hash.Hash, mb member) error {
	if hex.EncodeToString(h.Sum(nil)) != mb.SHA256 {
		return corrupt("member %q does not match its SHA-256", mb.Name)
	}
	return nil
}

// stage marks err as the backend's.
func (ar *archiveReader) stage(err error) error {
	if err != nil {
		return &stageError{err}
	}
	return nil
}

// abortTimeout bounds the clean-up of a staging run after a failed import.
const abortTimeout = 30 * time.Second
