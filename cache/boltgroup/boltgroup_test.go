package boltgroup

import (
	"errors"
	"fmt"
	"path/filepath"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"
)

// TestGroupCommitIsolatesFailures runs many writes at once, some failing:
// each failing write reports its own error and leaves nothing behind, and
// every other write lands.
func TestGroupCommitIsolatesFailures(t *testing.T) {
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "g.db"), 0o600, nil)
	require.NoError(t, err)
	defer db.Close()
	bucket := []byte("g")
	require.NoError(t, db.Update(func(tx *bbolt.Tx) error { _, err := tx.CreateBucket(bucket); return err }))
	g := New(db)
	const writers = 64
	errBad := errors.New("refused write")
	errs := make([]error, writers)
	var wg sync.WaitGroup
	for i := range writers {
		wg.Go(func() {
			errs[i] = g.Update(func(tx *bbolt.Tx) error {
				if err := tx.Bucket(bucket).Put(fmt.Appendf(nil, "k%02d", i), []byte("v")); err != nil {
					return err
				}
				if i%7 == 0 {
					return errBad // after its Put, which must be rolled back
				}
				return nil
			})
		})
	}
	wg.Wait()
	err = db.View(func(tx *bbolt.Tx) error {
		for i := range writers {
			landed := tx.Bucket(bucket).Get(fmt.Appendf(nil, "k%02d", i)) != nil
			wantFail := i%7 == 0
			if wantFail {
				assert.ErrorIs(t, errs[i], errBad, "write %d reports its own error", i)
			} else {
				assert.NoError(t, errs[i], "write %d", i)
			}
			assert.Equal(t, !wantFail, landed, "write %d landed", i)
		}
		return nil
	})
	require.NoError(t, err)
}
