package runs

import (
	"encoding/binary"
	"fmt"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"
)

// TestUsageOfRunsWrittenBeforeTheQuota takes a bbolt journal back to what
// a build before quotas wrote (version 1 tallies without Stored, no usage
// counter): Usage then counts the runs from their entries and bodies, to
// the byte of what the counter held, and the next Record counts on from
// there.
func TestUsageOfRunsWrittenBeforeTheQuota(t *testing.T) {
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, nil)
	require.NoError(t, err)
	t.Cleanup(func() { _ = db.Close() })
	j, err := NewBolt(db, BoltOptions{})
	require.NoError(t, err)
	ctx := t.Context()
	base := time.Date(2026, 1, 2, 3, 4, 5, 0, time.UTC)
	for run := range 2 {
		for i := range 5 {
			body := fmt.Appendf(nil, `{"n":%d}`, i%3)
			_, err := j.Record(ctx, "lab", fmt.Sprint("r", run), Entry{Key: fmt.Sprint("key-", i), Time: base},
				Answer{Status: 200, ContentType: "application/json", Body: body})
			require.NoError(t, err)
		}
	}
	counted, err := j.Usage(ctx, "lab")
	require.NoError(t, err)
	require.Positive(t, counted.Bytes)

	require.NoError(t, db.Update(func(tx *bbolt.Tx) error {
		tb := tx.Bucket(topBucket).Bucket([]byte("lab"))
		if err := tb.Delete(usageKey); err != nil {
			return err
		}
		for run := range 2 {
			rb := tb.Bucket(fmt.Appendf(nil, "r%d", run))
			tl, err := decodeTally(rb.Get(tallyKey))
			if err != nil {
				return err
			}
			v1 := []byte{1}
			for _, v := range [...]int64{tl.Calls, tl.Upstream, tl.Cost, tl.Saved, tl.Keys, tl.Bodies, tl.Bytes, tl.First, tl.Last} {
				v1 = binary.AppendVarint(v1, v)
			}
			if err := rb.Put(tallyKey, v1); err != nil {
				return err
			}
		}
		return nil
	}))
	legacy, err := j.Usage(ctx, "lab")
	require.NoError(t, err)
	assert.Equal(t, counted, legacy)

	e, err := j.Record(ctx, "lab", "r0", Entry{Key: "key-new", Time: base}, Answer{Status: 200, ContentType: "application/json", Body: []byte(`{"n":0}`)})
	require.NoError(t, err)
	after, err := j.Usage(ctx, "lab")
	require.NoError(t, err)
	r := record{Entry: e, Status: 200, ContentType: "application/json"}
	assert.Equal(t, legacy.Bytes+entryBytes(&r), after.Bytes, "a repeat body: the entry alone")
	require.NoError(t, j.Delete(ctx, "lab", "r0"))
	require.NoError(t, j.Delete(ctx, "lab", "r1"))
	none, err := j.Usage(ctx, "lab")
	require.NoError(t, err)
	assert.Zero(t, none.Bytes)
}
