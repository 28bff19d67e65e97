package runs

import (
	"archive/tar"
	"bytes"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"

	"github.com/klauspost/compress/zstd"
)

// Defaults of the ImportOptions limits.
const (
	// DefaultMaxArchiveBytes bounds the uncompressed archive (tar headers
	// included). Import holds the validated run in memory before writing
	// it, so this is also about the most memory an Import takes.
	DefaultMaxArchiveBytes = 512 << 20
	// DefaultMaxMembers bounds the members (distinct bodies + 2) of an
	// archive.
	DefaultMaxMembers = 1 << 20
	// maxWindow is the largest zstd window Import accepts; Export uses 8 MiB.
	maxWindow = 64 << 20
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
}

// archive is a fully validated archive in memory.
type archive struct {
	man    manifest
	recs   []record          // Seq 1..n
	bodies map[string][]byte // by ref; each used by some record
	order  []string          // refs in archive order
	tally  tally             // recomputed, equal to the manifest's
}

// sink is what Import needs from a backend: one atomic write of a whole
// run, refusing an existing run with ErrExists unless replace.
type sink interface {
	store(ctx context.Context, team, run string, a *archive, replace bool) error
}

// importRun validates the archive read from r and has dst store it under
// team.
func importRun(ctx context.Context, dst sink, team string, r io.Reader, opts ImportOptions) (Summary, error) {
	if err := validTeam(team); err != nil {
		return Summary{}, err
	}
	if opts.As != "" {
		if err := ValidID(opts.As); err != nil {
			return Summary{}, err
		}
	}
	a, err := readArchive(ctx, r, opts)
	if err != nil {
		return Summary{}, err
	}
	run := cmp.Or(opts.As, a.man.Run)
	if err := dst.store(ctx, team, run, a, opts.Replace); err != nil {
		return Summary{}, err
	}
	return a.tally.summary(team, run), nil
}

// corrupt returns an error wrapping ErrCorruptArchive.
func corrupt(format string, args ...any) error {
	return fmt.Errorf("%w: %s", ErrCorruptArchive, fmt.Sprintf(format, args...))
}

// limitReader fails once more than n bytes pass through it.
type limitReader struct {
	r io.Reader
	n int64
}

func (l *limitReader) Read(p []byte) (int, error) {
	if l.n < 0 {
		return 0, corrupt("uncompressed archive is larger than the import limit")
	}
	n, err := l.r.Read(p)
	l.n -= int64(n)
	if l.n < 0 {
		return 0, corrupt("uncompressed archive is larger than the import limit")
	}
	return n, err
}

// readArchive reads and validates a whole archive. It refuses, with an
// error wrapping ErrCorruptArchive: a damaged or truncated zstd stream or
// tar; a file whose trailer is missing or does not match; members other than manifest.json, entries and the listed bodies, or
// out of the manifest's order, or duplicated, or of another type than a
// regular file; a format name or version it does not know; a member whose
// size or SHA-256 is not the manifest's; entries that break Record's rules,
// whose Seq is not 1..n in order, whose occurrences are not 1..k per key in
// order, or that name a body the archive lacks; bodies no entry uses; and
// summary figures that are not the entries' sums. Sizes are checked against
// the limits before anything is allocated.
func readArchive(ctx context.Context, r io.Reader, opts ImportOptions) (*archive, error) {
	maxBytes := cmp.Or(opts.MaxBytes, DefaultMaxArchiveBytes)
	maxMembers := cmp.Or(opts.MaxMembers, DefaultMaxMembers)
	maxBody := cmp.Or(opts.MaxBodyBytes, MaxBodyBytes)
	// Compressed, an archive is smaller than the tar it holds, bar zstd's
	// few bytes of framing per block.
	src := newTrailerReader(ctx, r, maxBytes+maxBytes/64+4096)
	zr, err := zstd.NewReader(src, zstd.WithDecoderConcurrency(1), zstd.WithDecoderLowmem(true),
		zstd.WithDecoderMaxWindow(maxWindow))
	if err != nil {
		return nil, fmt.Errorf("runs: import: %w", err)
	}
	defer zr.Close()
	a, err := parseArchive(ctx, &limitReader{r: zr, n: maxBytes}, maxBytes, maxMembers, maxBody)
	if err == nil && !src.check() {
		err = corrupt("the file does not match its trailing SHA-256 (damaged, truncated or extended)")
	}
	if err != nil {
		if src.tooBig {
			return nil, errTooBig
		}
		if src.err != nil {
			return nil, fmt.Errorf("runs: import: read archive: %w", src.err)
		}
		if ctxErr := ctx.Err(); ctxErr != nil {
			return nil, ctxErr
		}
		if !errors.Is(err, ErrCorruptArchive) {
			err = fmt.Errorf("%w: %w", ErrCorruptArchive, err)
		}
		return nil, err
	}
	return a, nil
}

func parseArchive(ctx context.Context, r io.Reader, maxBytes int64, maxMembers int, maxBody int64) (*archive, error) {
	tr := tar.NewReader(r)
	budget := maxBytes
	// next reads the next member, which must be called name and, if size is
	// not -1, be size bytes long.
	next := func(name string, size int64) ([]byte, error) {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		hdr, err := tr.Next()
		if err == io.EOF {
			return nil, corrupt("archive ends before member %q", name)
		}
		if err != nil {
			return nil, corrupt("reading member %q: %v", name, err)
		}
		switch {
		case hdr.Name != name:
			return nil, corrupt("member %.80q where %q belongs", hdr.Name, name)
		case hdr.Typeflag != tar.TypeReg:
			return nil, corrupt("member %q is of tar type %q, not a regular file", name, hdr.Typeflag)
		case size >= 0 && hdr.Size != size:
			return nil, corrupt("member %q is %d bytes, the manifest says %d", name, hdr.Size, size)
		case hdr.Size < 0 || hdr.Size > budget:
			return nil, corrupt("member %q of %d bytes is past the import limit", name, hdr.Size)
		}
		budget -= hdr.Size
		data := make([]byte, hdr.Size)
		if _, err := io.ReadFull(tr, data); err != nil {
			return nil, corrupt("reading member %q: %v", name, err)
		}
		return data, nil
	}

	mj, err := next(manifestName, -1)
	if err != nil {
		return nil, err
	}
	a := &archive{bodies: map[string][]byte{}}
	if err := decodeManifest(mj, &a.man, maxMembers, maxBody, budget); err != nil {
		return nil, err
	}
	var entries []byte
	for i, m := range a.man.Members {
		data, err := next(m.Name, m.Size)
		if err != nil {
			return nil, err
		}
		if sum := sha256.Sum256(data); hex.EncodeToString(sum[:]) != m.SHA256 {
			return nil, corrupt("member %q does not match its SHA-256", m.Name)
		}
		if i == 0 {
			entries = data
			continue
		}
		ref := m.SHA256
		a.bodies[ref] = data
		a.order = append(a.order, ref)
	}
	if hdr, err := tr.Next(); err != io.EOF {
		if err == nil {
			return nil, corrupt("unexpected member %.80q after the last listed one", hdr.Name)
		}
		return nil, corrupt("after the last member: %v", err)
	}
	// Read the stream to its end: that checks the zstd checksum and finds
	// truncation or data after the tar's end.
	rest, err := io.Copy(io.Discard, r)
	if err != nil {
		return nil, corrupt("after the tar: %v", err)
	}
	if rest != 0 {
		return nil, corrupt("%d bytes after the end of the tar", rest)
	}
	if err := a.decodeEntries(entries); err != nil {
		return nil, err
	}
	return a, nil
}

// decodeManifest parses and checks the manifest; budget is what the limit
// on the uncompressed size leaves for the other members.
func decodeManifest(data []byte, m *manifest, maxMembers int, maxBody, budget int64) error {
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
	case len(m.Members) < 2:
		return corrupt("manifest lists %d members, want entries and at least one body", len(m.Members))
	case len(m.Members)+1 > maxMembers:
		return corrupt("%d members, the import limit is %d", len(m.Members)+1, maxMembers)
	}
	if err := ValidID(m.Run); err != nil {
		return corrupt("manifest: %v", err)
	}
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
		case i > 0 && mb.Size > maxBody:
			return corrupt("body %.16s… is %d bytes, the import limit is %d", mb.SHA256, mb.Size, maxBody)
		case mb.Size < 0:
			return corrupt("member %.80q has size %d", mb.Name, mb.Size)
		}
		total += mb.Size
		if total > budget {
			return corrupt("members total more than the import limit")
		}
	}
	return nil
}

// decodeEntries parses the entries member into a.recs and checks them
// against each other, the bodies and the manifest.
func (a *archive) decodeEntries(data []byte) error {
	d := json.NewDecoder(bytes.NewReader(data))
	d.DisallowUnknownFields()
	occ := map[string]int64{}
	used := make(map[string]bool, len(a.bodies))
	for d.More() {
		var ae archEntry
		if err := d.Decode(&ae); err != nil {
			return corrupt("entry %d: %v", len(a.recs)+1, err)
		}
		r := ae.record()
		want := int64(len(a.recs)) + 1
		switch {
		case want > a.man.Entries:
			return corrupt("more entries than the manifest's %d", a.man.Entries)
		case r.Seq != want:
			return corrupt("entry %d has seq %d", want, r.Seq)
		case r.Occurrence != occ[r.Key]+1:
			return corrupt("entry %d is occurrence %d of its key, want %d", want, r.Occurrence, occ[r.Key]+1)
		}
		if err := validRecord(&r); err != nil {
			return corrupt("entry %d: %v", want, err)
		}
		body, ok := a.bodies[r.Ref]
		if !ok {
			return corrupt("entry %d uses body %.16s…, which the archive lacks", want, r.Ref)
		}
		occ[r.Key]++
		a.tally.add(&r, r.Occurrence == 1, !used[r.Ref], len(body))
		used[r.Ref] = true
		a.recs = append(a.recs, r)
	}
	if _, err := d.Token(); err != io.EOF {
		return corrupt("entries: data after the last entry")
	}
	switch {
	case int64(len(a.recs)) != a.man.Entries:
		return corrupt("%d entries, the manifest says %d", len(a.recs), a.man.Entries)
	case len(used) != len(a.bodies):
		return corrupt("%d bodies no entry uses", len(a.bodies)-len(used))
	case !newArchSummary(a.tally).equal(a.man.Summary):
		return corrupt("summary figures do not match the entries")
	}
	return nil
}
