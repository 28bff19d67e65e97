package runs_test

import (
	"bytes"
	"context"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/cache/runs"
)

// TestBoltReopen closes the file and opens it again: everything recorded,
// and an imported run, is still there, and recording goes on where it
// stopped.
func TestBoltReopen(t *testing.T) {
	t.Parallel()
	path := filepath.Join(t.TempDir(), "stint.db")
	calls := mixedCalls(30)
	j, db := openBolt(t, path)
	recordAll(t, j, "lab", "r", calls)
	var archive bytes.Buffer
	require.NoError(t, j.Export(context.Background(), "lab", "r", &archive))
	_, err := j.Import(context.Background(), "other", bytes.NewReader(archive.Bytes()), runs.ImportOptions{As: "imported"})
	require.NoError(t, err)
	require.NoError(t, db.Close())
	j, _ = openBolt(t, path)
	checkReplay(t, j, "lab", "r", calls)
	checkReplay(t, j, "other", "imported", calls)
	s, err := j.Summary(context.Background(), "lab", "r")
	require.NoError(t, err, "Summary after reopen")
	assert.True(t, sameSummary(s, wantSummary("lab", "r", calls)), "Summary after reopen: %+v", s)
	e, err := j.Record(context.Background(), "lab", "r", calls[0].entry, calls[0].answer)
	require.NoError(t, err, "Record after reopen")
	assert.Equal(t, int64(len(calls)+1), e.Seq, "Record after reopen: seq")
}

// TestBoltSharedFile checks that the journal keeps to its own bucket of a
// file others use too.
func TestBoltSharedFile(t *testing.T) {
	t.Parallel()
	j, db := openBolt(t, filepath.Join(t.TempDir(), "stint.db"))
	err := db.Update(func(tx *bbolt.Tx) error {
		b, err := tx.CreateBucket([]byte("stint.cache.v1"))
		if err != nil {
			return err
		}
		return b.Put([]byte("k"), []byte("v"))
	})
	require.NoError(t, err)
	recordAll(t, j, "lab", "r", mixedCalls(4))
	require.NoError(t, j.Delete(context.Background(), "lab", "r"))
	var names []string
	_ = db.View(func(tx *bbolt.Tx) error {
		return tx.ForEach(func(name []byte, _ *bbolt.Bucket) error {
			names = append(names, string(name))
			return nil
		})
	})
	assert.Equal(t, []string{"stint.cache.v1", "stint.runs.v1"}, names, "top-level buckets: the cache's and stint.runs.v1")
	_, err = runs.NewBolt(nil, runs.BoltOptions{})
	assert.Error(t, err, "NewBolt(nil, runs.BoltOptions{})")
}

// TestBoltCorruptValues damages stored values in place: reads fail with
// ErrCorrupt, never panic, and never return wrong bytes.
func TestBoltCorruptValues(t *testing.T) {
	t.Parallel()
	calls := mixedCalls(6)
	tests := []struct {
		name   string
		bucket string // inside the run's bucket; "" for the run's own keys
		damage func(k, v []byte) []byte
	}{
		{"record truncated", "e", func(_, v []byte) []byte { return v[:len(v)/2] }},
		{"record version", "e", func(_, v []byte) []byte { v = append([]byte{}, v...); v[0] = 9; return v }},
		{"record trailing bytes", "e", func(_, v []byte) []byte { return append(append([]byte{}, v...), 0) }},
		{"record seq", "e", func(_, v []byte) []byte { v = append([]byte{}, v...); v[8] ^= 1; return v }},
		{"body flipped", "b", func(_, v []byte) []byte { v = append([]byte{}, v...); v[len(v)/2] ^= 1; return v }},
		{"counter", "o", func(_, v []byte) []byte { return v[:3] }},
		{"summary", "", func(k, v []byte) []byte { return v[:2] }},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			j, db := openBolt(t, filepath.Join(t.TempDir(), "stint.db"))
			recordAll(t, j, "lab", "r", calls)
			err := db.Update(func(tx *bbolt.Tx) error {
				rb := tx.Bucket([]byte("stint.runs.v1")).Bucket([]byte("lab")).Bucket([]byte("r"))
				b := rb
				if tc.bucket != "" {
					b = rb.Bucket([]byte(tc.bucket))
				}
				type kv struct{ k, v []byte }
				var all []kv
				_ = b.ForEach(func(k, v []byte) error {
					if len(v) > 0 {
						all = append(all, kv{append([]byte{}, k...), append([]byte{}, v...)})
					}
					return nil
				})
				for _, e := range all {
					if err := b.Put(e.k, tc.damage(e.k, e.v)); err != nil {
						return err
					}
				}
				return nil
			})
			require.NoError(t, err)
			ctx := context.Background()
			failed := false
			for _, c := range calls {
				_, a, err := j.Lookup(ctx, "lab", "r", c.key, 1)
				if err == nil {
					require.Equal(t, string(c.answer.Body), string(a.Body), "Lookup returned wrong bytes after damage")
				}
				if err != nil {
					assert.ErrorIs(t, err, runs.ErrCorrupt, "Lookup")
					failed = true
				}
			}
			var errs []error
			if tc.bucket != "o" { // Export does not read the counters
				errs = append(errs, j.Export(ctx, "lab", "r", &bytes.Buffer{}))
			}
			if _, err := j.Summary(ctx, "lab", "r"); tc.bucket == "" {
				errs = append(errs, err)
			}
			if tc.bucket == "o" {
				_, err := j.Count(ctx, "lab", "r", calls[0].key)
				errs = append(errs, err)
			}
			for _, err := range errs {
				assert.ErrorIs(t, err, runs.ErrCorrupt)
			}
			if tc.bucket != "" && tc.bucket != "o" {
				assert.True(t, failed, "no Lookup noticed the damage")
			}
		})
	}
}
