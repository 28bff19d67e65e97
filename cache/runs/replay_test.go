package runs_test

import (
	"context"
	"math/rand/v2"
	"slices"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"

	"github.com/stintlab/stint/cache/runs"
)

// TestReplayWithCursor replays a recorded run the way the proxy does: each
// request asks the Cursor for its key's next occurrence and looks that up.
// The requests arrive concurrently and in a shuffled order; each replayed
// request still gets an answer recorded for its own key, and across all
// requests with one key every recorded answer is handed out exactly once.
func TestReplayWithCursor(t *testing.T) {
	t.Parallel()
	j := boltBackend().open(t)
	calls := mixedCalls(48)
	recordAll(t, j, "lab", "r", calls)
	order := rand.New(rand.NewPCG(1, 2)).Perm(len(calls))
	var (
		c    runs.Cursor
		mu   sync.Mutex // guards got
		got  = map[string][]string{}
		wg   sync.WaitGroup
		want = map[string][]string{}
	)
	for _, i := range order {
		want[calls[i].key] = append(want[calls[i].key], string(calls[i].answer.Body))
		wg.Go(func() {
			key := calls[i].key
			_, a, err := j.Lookup(context.Background(), "lab", "r", key, c.Next("lab", "r", "replay-1", key))
			if !assert.NoError(t, err) {
				return
			}
			mu.Lock()
			got[key] = append(got[key], string(a.Body))
			mu.Unlock()
		})
	}
	wg.Wait()
	for key, w := range want {
		g := got[key]
		slices.Sort(g)
		slices.Sort(w)
		assert.Equal(t, w, g, "key %.8s: the answers replay handed out, against those recorded", key)
	}
	// One more request than recorded is a replay miss.
	key := calls[0].key
	_, _, err := j.Lookup(context.Background(), "lab", "r", key, c.Next("lab", "r", "replay-1", key))
	assert.Error(t, err, "Lookup past the recorded occurrences")
}
