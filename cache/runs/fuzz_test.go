package runs_test

import (
	"bytes"
	"context"
	"testing"

	"github.com/klauspost/compress/zstd"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/runs"
)

// FuzzImport feeds Import arbitrary bytes: it never panics, and it either
// imports a run that then replays from its own entries, or fails with an
// error that leaves nothing behind. Inputs that start with zstd's magic are
// imported as they are; others are taken as the uncompressed tar and packed
// (zstd and trailer) first, so that mutations reach the tar, manifest and
// entries checks behind zstd's checksum.
func FuzzImport(f *testing.F) {
	good := exampleArchive(f, smallCalls())
	f.Add(good)
	f.Add(writeTar(f, readMembers(f, good)))
	f.Add(good[:len(good)/2])
	f.Add(good[:len(good)-40])
	flipped := bytes.Clone(good)
	flipped[len(flipped)/3] ^= 0x10
	f.Add(flipped)
	f.Add(writeMembers(f, []tarMember{{name: "manifest.json", data: []byte(`{"format":"stint-run-archive","version":1}`)}}))
	f.Add([]byte{})
	j := boltBackend().open(f)
	ctx := context.Background()
	zw, err := zstd.NewWriter(nil)
	if err != nil {
		f.Fatal(err)
	}
	defer zw.Close()
	f.Fuzz(func(t *testing.T, data []byte) {
		if !bytes.HasPrefix(data, []byte{0x28, 0xb5, 0x2f, 0xfd}) {
			data = withTrailer(zw.EncodeAll(data, nil))
		}
		s, err := j.Import(ctx, "fuzz", bytes.NewReader(data), runs.ImportOptions{As: "target", MaxBytes: 8 << 20})
		if err != nil {
			require.ErrorIs(t, err, runs.ErrCorruptArchive)
			wantNoTrace(t, j, "fuzz", "target")
			return
		}
		require.Equal(t, "target", s.Run, "Import returned %+v", s)
		require.Equal(t, "fuzz", s.Team, "Import returned %+v", s)
		require.GreaterOrEqual(t, s.Calls, int64(1), "Import returned %+v", s)
		var entries []runs.Entry
		if err := j.Entries(ctx, "fuzz", "target", func(e runs.Entry) error {
			entries = append(entries, e)
			return nil
		}); err != nil {
			require.NoError(t, err)
		}
		for _, e := range entries {
			got, a, err := j.Lookup(ctx, "fuzz", "target", e.Key, e.Occurrence)
			require.NoError(t, err, "Lookup of imported entry %d", e.Seq)
			require.Equal(t, e.Seq, got.Seq, "Lookup of imported entry %d", e.Seq)
			require.Equal(t, e.Ref, refOf(a.Body), "Lookup of imported entry %d", e.Seq)
		}
		require.NoError(t, j.Delete(ctx, "fuzz", "target"))
	})
}
