package runs_test

import (
	"archive/tar"
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"testing"
	"testing/iotest"

	"github.com/klauspost/compress/zstd"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/runs"
)

// TestArchiveAcrossBackends exports from each backend and imports into a
// fresh journal of each: every body comes back byte for byte, the summary
// is the same, and exporting the import gives the same members again.
func TestArchiveAcrossBackends(t *testing.T) {
	t.Parallel()
	backends := []backend{boltBackend(), redisBackend(t)}
	calls := mixedCalls(36)
	for _, from := range backends {
		src := from.open(t)
		recordAll(t, src, "lab", "sweep-7", calls)
		var archive bytes.Buffer
		require.NoError(t, src.Export(context.Background(), "lab", "sweep-7", &archive))
		for _, to := range backends {
			t.Run(from.name+"-to-"+to.name, func(t *testing.T) {
				dst := to.open(t)
				s, err := dst.Import(context.Background(), "other-team", bytes.NewReader(archive.Bytes()), runs.ImportOptions{})
				require.NoError(t, err)
				want, _ := src.Summary(context.Background(), "lab", "sweep-7")
				want.Team = "other-team"
				assert.True(t, sameSummary(s, want), "Import returned\n %+v\nwant %+v", s, want)
				got, err := dst.Summary(context.Background(), "other-team", "sweep-7")
				require.NoError(t, err, "Summary after Import")
				assert.True(t, sameSummary(got, want), "Summary after Import: %+v", got)
				checkReplay(t, dst, "other-team", "sweep-7", calls)
				var again bytes.Buffer
				require.NoError(t, dst.Export(context.Background(), "other-team", "sweep-7", &again))
				a, b := readMembers(t, archive.Bytes()), readMembers(t, again.Bytes())
				require.Len(t, b, len(a), "re-export's members")
				for i := 1; i < len(a); i++ { // the manifest differs in team and created time
					assert.Equal(t, a[i].name, b[i].name, "re-exported member %d", i)
					assert.True(t, bytes.Equal(a[i].data, b[i].data), "re-exported member %d %s differs", i, b[i].name)
				}
			})
		}
	}
}

// tarMember is one member of an archive, as tests read and rewrite them.
type tarMember struct {
	name string
	data []byte
	typ  byte
}

func readMembers(t testing.TB, archive []byte) []tarMember {
	t.Helper()
	zr, err := zstd.NewReader(bytes.NewReader(archive))
	require.NoError(t, err)
	defer zr.Close()
	tr := tar.NewReader(zr)
	var ms []tarMember
	for {
		h, err := tr.Next()
		if err == io.EOF {
			return ms
		}
		require.NoError(t, err)
		data, err := io.ReadAll(tr)
		require.NoError(t, err)
		ms = append(ms, tarMember{name: h.Name, data: data, typ: h.Typeflag})
	}
}

func writeMembers(t testing.TB, ms []tarMember) []byte {
	t.Helper()
	return compress(t, writeTar(t, ms))
}

// writeTar is the uncompressed tar of ms.
func writeTar(t testing.TB, ms []tarMember) []byte {
	t.Helper()
	var buf bytes.Buffer
	tw := tar.NewWriter(&buf)
	for _, m := range ms {
		typ := m.typ
		if typ == 0 {
			typ = tar.TypeReg
		}
		require.NoError(t, tw.WriteHeader(&tar.Header{Name: m.name, Typeflag: typ, Size: int64(len(m.data)), Mode: 0o644}))
		_, err := tw.Write(m.data)
		require.NoError(t, err)
	}
	require.NoError(t, tw.Close())
	return buf.Bytes()
}

// compress is b as an archive file: zstd, then the trailer.
func compress(t testing.TB, b []byte) []byte {
	t.Helper()
	zw, err := zstd.NewWriter(nil)
	require.NoError(t, err)
	defer zw.Close()
	return withTrailer(zw.EncodeAll(b, nil))
}

// compressStream is compress through zstd's streaming writer.
func compressStream(t testing.TB, b []byte, opts ...zstd.EOption) []byte {
	t.Helper()
	var out bytes.Buffer
	zw, err := zstd.NewWriter(&out, opts...)
	require.NoError(t, err)
	_, err = zw.Write(b)
	require.NoError(t, err)
	require.NoError(t, zw.Close())
	return withTrailer(out.Bytes())
}

// withTrailer appends the archive trailer: a zstd skippable frame holding
// the SHA-256 of the bytes before it.
func withTrailer(b []byte) []byte {
	b = slices.Clone(b)
	sum := sha256.Sum256(b)
	b = append(b, 0x5e, 0x2a, 0x4d, 0x18, 32, 0, 0, 0)
	return append(b, sum[:]...)
}

// parts is an archive taken apart for a test to break one rule of: the
// manifest and the entries as generic JSON, and the members.
type parts struct {
	manifest map[string]any
	entries  []map[string]any
	members  []tarMember // members[0] is the manifest, [1] the entries
	original []byte      // the entries as explode re-encoded them
}

func explode(t testing.TB, archive []byte) *parts {
	t.Helper()
	p := &parts{members: readMembers(t, archive)}
	d := json.NewDecoder(bytes.NewReader(p.members[0].data))
	d.UseNumber()
	require.NoError(t, d.Decode(&p.manifest))
	d = json.NewDecoder(bytes.NewReader(p.members[1].data))
	d.UseNumber()
	for d.More() {
		var e map[string]any
		require.NoError(t, d.Decode(&e))
		p.entries = append(p.entries, e)
	}
	p.original = encodeEntries(t, p.entries)
	return p
}

func encodeEntries(t testing.TB, entries []map[string]any) []byte {
	t.Helper()
	var b bytes.Buffer
	for _, e := range entries {
		require.NoError(t, json.NewEncoder(&b).Encode(e))
	}
	return b.Bytes()
}

// build writes p back; with fixSums the manifest's member list is made to
// match the members (so that only the intended rule is broken).
func (p *parts) build(t testing.TB, fixSums bool) []byte {
	t.Helper()
	// Keep the exported bytes of the entries unless the test changed them.
	if entries := encodeEntries(t, p.entries); !bytes.Equal(entries, p.original) {
		p.members[1].data = entries
	}
	if fixSums {
		var list []any
		for _, m := range p.members[1:] {
			sum := sha256.Sum256(m.data)
			list = append(list, map[string]any{"name": m.name, "size": len(m.data), "sha256": hex.EncodeToString(sum[:])})
		}
		p.manifest["members"] = list
	}
	mj, err := json.Marshal(p.manifest)
	require.NoError(t, err)
	p.members[0].data = mj
	return writeMembers(t, p.members)
}

// exampleArchive records a small run and exports it.
func exampleArchive(t testing.TB, calls []call) []byte {
	t.Helper()
	j := boltBackend().open(t)
	recordAll(t, j, "lab", "small", calls)
	var buf bytes.Buffer
	require.NoError(t, j.Export(context.Background(), "lab", "small", &buf))
	return buf.Bytes()
}

// smallCalls is a run with three distinct bodies and a repeated key,
// small enough to damage at every offset.
func smallCalls() []call {
	calls := mixedCalls(6)
	return []call{calls[0], calls[1], calls[3], calls[0]}
}

// TestImportRefuses breaks one rule of the archive format per case.
func TestImportRefuses(t *testing.T) {
	t.Parallel()
	good := exampleArchive(t, smallCalls())
	rebuilt := func(fix bool, change func(p *parts)) []byte {
		p := explode(t, good)
		change(p)
		return p.build(t, fix)
	}
	// Sanity: taking the archive apart and back together is accepted, so
	// each case below fails for its own change only.
	_, err := boltBackend().open(t).Import(context.Background(), "lab", bytes.NewReader(rebuilt(true, func(*parts) {})), runs.ImportOptions{})
	require.NoError(t, err, "rebuilt archive refused")
	// A bomb: 64 MiB of zeros after the tar's end, a few KB compressed.
	// Written as a stream, as Export writes, so its frames declare an 8 MiB
	// window rather than their whole size.
	bomb := compressStream(t, append(writeTar(t, readMembers(t, good)), make([]byte, 64<<20)...))
	tests := []struct {
		name    string
		archive []byte
		opts    runs.ImportOptions
		want    string // in the error message
	}{
		{"empty input", nil, runs.ImportOptions{}, "archive ends"},
		{"not zstd", []byte("this is not an archive at all, just text"), runs.ImportOptions{}, "corrupt"},
		{"wrong format name", rebuilt(true, func(p *parts) { p.manifest["format"] = "other-archive" }), runs.ImportOptions{}, "format"},
		{"wrong version", rebuilt(true, func(p *parts) { p.manifest["version"] = 2 }), runs.ImportOptions{}, "version 2"},
		{"unknown manifest field", rebuilt(true, func(p *parts) { p.manifest["extra"] = true }), runs.ImportOptions{}, "unknown field"},
		{"bad run id", rebuilt(true, func(p *parts) { p.manifest["run"] = "../etc" }), runs.ImportOptions{}, "run id"},
		{"bad entries checksum", rebuilt(false, func(p *parts) { p.entries[0]["model"] = "tampered" }), runs.ImportOptions{}, "bytes, the manifest says"},
		{"bad body checksum", rebuilt(false, func(p *parts) { p.members[2].data[0] ^= 1 }), runs.ImportOptions{}, "SHA-256"},
		{"body not named by its hash", rebuilt(true, func(p *parts) { p.members[2].name = "bodies/" + strings.Repeat("0", 64) }), runs.ImportOptions{}, "not named"},
		{"manifest not first", rebuilt(true, func(p *parts) { p.members[0], p.members[1] = p.members[1], p.members[0] }), runs.ImportOptions{}, "belongs"},
		{"duplicate member", rebuilt(false, func(p *parts) { p.members = append(p.members, p.members[2]) }), runs.ImportOptions{}, "unexpected member"},
		{"duplicate listing", rebuilt(false, func(p *parts) {
			l := p.manifest["members"].([]any)
			p.manifest["members"] = append(l, l[1])
		}), runs.ImportOptions{}, "listed twice"},
		{"unexpected member", rebuilt(false, func(p *parts) { p.members = append(p.members, tarMember{name: "README", data: []byte("hi")}) }), runs.ImportOptions{}, "unexpected member"},
		{"not a regular file", rebuilt(false, func(p *parts) { p.members[2].typ = tar.TypeSymlink; p.members[2].data = nil }), runs.ImportOptions{}, "regular file"},
		{"missing body", rebuilt(true, func(p *parts) { p.members = p.members[:len(p.members)-1] }), runs.ImportOptions{}, "lacks"},
		{"unused body", rebuilt(true, func(p *parts) {
			body := []byte("nobody uses me")
			sum := sha256.Sum256(body)
			p.members = append(p.members, tarMember{name: "bodies/" + hex.EncodeToString(sum[:]), data: body})
		}), runs.ImportOptions{}, "no entry uses"},
		{"seq out of order", rebuilt(true, func(p *parts) { p.entries[1], p.entries[2] = p.entries[2], p.entries[1] }), runs.ImportOptions{}, "seq"},
		{"seq gap", rebuilt(true, func(p *parts) { p.entries[3]["seq"] = 5 }), runs.ImportOptions{}, "seq 5"},
		{"occurrence wrong", rebuilt(true, func(p *parts) { p.entries[3]["occurrence"] = 1 }), runs.ImportOptions{}, "occurrence"},
		{"missing entry", rebuilt(true, func(p *parts) { p.entries = p.entries[:3] }), runs.ImportOptions{}, "3 entries"},
		{"summary mismatch", rebuilt(true, func(p *parts) { p.manifest["summary"].(map[string]any)["cost_nanos"] = 1 }), runs.ImportOptions{}, "summary"},
		{"entry breaks Record's rules", rebuilt(true, func(p *parts) { p.entries[0]["status"] = 0 }), runs.ImportOptions{}, "status"},
		{"too many members", good, runs.ImportOptions{MaxMembers: 3}, "limit"},
		{"body too large", good, runs.ImportOptions{MaxBodyBytes: 40}, "limit"},
		{"archive too large", good, runs.ImportOptions{MaxBytes: 2048}, "limit"},
		{"bomb", bomb, runs.ImportOptions{MaxBytes: 1 << 20}, "limit"},
		{"bomb within the limit", bomb, runs.ImportOptions{MaxBytes: 128 << 20}, "after the end of the tar"},
		{"window past the limit", compressStream(t, append(writeTar(t, readMembers(t, good)), make([]byte, 16<<20)...), zstd.WithWindowSize(32<<20)), runs.ImportOptions{}, "limit"},
		{"trailing garbage", append(slices.Clip(good), 0x28, 0xb5, 0x2f, 0xfd, 1, 2, 3), runs.ImportOptions{}, "corrupt"},
		{"no trailer", good[:len(good)-40], runs.ImportOptions{}, "trailing SHA-256"},
		{"skippable flood", withTrailer(append(append([]byte{0x50, 0x2a, 0x4d, 0x18, 0, 0, 0x20, 0}, make([]byte, 2<<20)...), good[:len(good)-40]...)),
			runs.ImportOptions{MaxBytes: 1 << 20}, "compressed archive is larger"},
		{"trailer of other bytes", withTrailer(good[:len(good)-41]), runs.ImportOptions{}, "corrupt"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			j := boltBackend().open(t)
			_, err := j.Import(context.Background(), "lab", bytes.NewReader(tc.archive), tc.opts)
			want := runs.ErrCorruptArchive
			if tc.want == "limit" || tc.want == "compressed archive is larger" {
				want = runs.ErrTooLarge
			}
			require.ErrorIs(t, err, want)
			require.Contains(t, err.Error(), tc.want)
			wantNoTrace(t, j, "lab", "small")
		})
	}
}

// TestImportDamaged truncates the archive at every offset and flips bits
// of every byte of it: Import refuses each (never panics) and leaves no
// trace. The checks run before a backend is touched, so the Redis journal
// gets every fifth offset only.
func TestImportDamaged(t *testing.T) {
	t.Parallel()
	good := exampleArchive(t, smallCalls())
	backends := []runs.Journal{boltBackend().open(t), redisBackend(t).open(t)}
	ctx := context.Background()
	try := func(offset int, what string, data []byte) {
		t.Helper()
		for i, j := range backends {
			if i > 0 && offset%5 != 0 {
				continue
			}
			_, err := j.Import(ctx, "lab", bytes.NewReader(data), runs.ImportOptions{})
			require.ErrorIs(t, err, runs.ErrCorruptArchive, "%s: got", what)
		}
	}
	for n := range len(good) {
		try(n, "truncated to "+strconv.Itoa(n)+" bytes", good[:n])
	}
	for i := range good {
		for _, mask := range []byte{0x01, 0x80, 0xff} {
			bad := slices.Clone(good)
			bad[i] ^= mask
			try(i, fmt.Sprintf("byte %d of %d ^ %#x", i, len(good), mask), bad)
		}
	}
	for _, j := range backends {
		wantNoTrace(t, j, "lab", "small")
	}
	// The undamaged archive still imports, so the refusals were the damage's.
	for _, j := range backends {
		_, err := j.Import(ctx, "lab", bytes.NewReader(good), runs.ImportOptions{})
		require.NoError(t, err)
	}
}

// TestImportSourceError tells a failing reader from a corrupt archive.
func TestImportSourceError(t *testing.T) {
	t.Parallel()
	good := exampleArchive(t, smallCalls())
	cut := errors.New("connection reset")
	j := boltBackend().open(t)
	r := io.MultiReader(bytes.NewReader(good[:len(good)/2]), iotest.ErrReader(cut))
	_, err := j.Import(context.Background(), "lab", r, runs.ImportOptions{})
	assert.ErrorIs(t, err, cut, "the reader's error")
	assert.NotErrorIs(t, err, runs.ErrCorruptArchive, "a reader's error is not a corrupt archive")
	wantNoTrace(t, j, "lab", "small")
}
