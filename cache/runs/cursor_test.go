package runs_test

import (
	"slices"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/runs"
)

func TestCursor(t *testing.T) {
	var c runs.Cursor // the zero value is ready
	steps := []struct {
		team, run, session, key string
		want                    int64
	}{
		{"lab", "r", "s1", "k1", 1},
		{"lab", "r", "s1", "k1", 2},
		{"lab", "r", "s1", "k2", 1}, // keys count apart
		{"lab", "r", "s2", "k1", 1}, // sessions count apart
		{"lab", "r2", "s1", "k1", 1},
		{"other", "r", "s1", "k1", 1}, // teams count apart
		{"lab", "r", "s1", "k1", 3},
	}
	for i, s := range steps {
		assert.Equal(t, s.want, c.Next(s.team, s.run, s.session, s.key), "step %d Next(%s %s %s %s)", i, s.team, s.run, s.session, s.key)
	}
	c.Reset("lab", "r")
	assert.EqualValues(t, 1, c.Next("lab", "r", "s1", "k1"), "after Reset")
	assert.EqualValues(t, 2, c.Next("lab", "r2", "s1", "k1"), "Reset of r touched r2")
}

// TestCursorConcurrent hands out occurrences of one key to many goroutines:
// together they get exactly 1..n, each once.
func TestCursorConcurrent(t *testing.T) {
	const workers, each = 16, 50
	var c runs.Cursor
	got := make([][]int64, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Go(func() {
			for range each {
				got[w] = append(got[w], c.Next("lab", "r", "s", "k"))
			}
		})
	}
	wg.Wait()
	all := slices.Concat(got...)
	slices.Sort(all)
	for i, o := range all {
		require.Equal(t, int64(i+1), o, "occurrences are not 1..%d: %v", workers*each, all)
	}
}
