package proxy_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"net/http"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/proxy"
)

// gatedStore is a real embedded store whose Puts wait at a gate: each Put
// announces itself on started and goes on once the gate opens.
type gatedStore struct {
	cache.Store
	started chan struct{}
	gate    chan struct{}
	once    sync.Once
}

func (g *gatedStore) Put(ctx context.Context, key string, value []byte, ttl time.Duration) error {
	g.started <- struct{}{}
	<-g.gate
	return g.Store.Put(ctx, key, value, ttl)
}

// open lets every Put through, now and later.
func (g *gatedStore) open() { g.once.Do(func() { close(g.gate) }) }

// TestStoreBeforeAnswerWaitsForTheEntry: with StoreBeforeAnswer, while a
// miss's entry is being stored the client has no answer (a stream has its
// data but not its final event); once the store returns, the answer
// follows and the entry is on disk. Without it, the answer comes first.
func TestStoreBeforeAnswerWaitsForTheEntry(t *testing.T) {
	for _, tt := range []struct {
		name   string
		first  bool
		stream bool
	}{
		{"plain, store first", true, false},
		{"streamed, store first", true, true},
		{"plain, store behind", false, false},
		{"streamed, store behind", false, true},
	} {
		t.Run(tt.name, func(t *testing.T) {
			disk, err := boltstore.Open(filepath.Join(t.TempDir(), "stint.db"), boltstore.Options{})
			require.NoError(t, err)
			gate := &gatedStore{Store: disk, started: make(chan struct{}, 1), gate: make(chan struct{})}
			t.Cleanup(func() { _ = disk.Close() })
			r := newRig(t, func(o *proxy.Options) { o.Store, o.StoreBeforeAnswer = gate, tt.first })
			t.Cleanup(gate.open) // before the rig closes, also when the test fails

			raw, _ := json.Marshal(greedy("the lock keeper waits", "stream", tt.stream))
			done := make(chan bool, 1)
			go func() {
				resp, err := http.Post(r.srv.URL+"/v1/completions", "application/json", bytes.NewReader(raw))
				if err != nil {
					done <- false
					return
				}
				defer resp.Body.Close()
				done <- received(resp, tt.stream)
			}()
			if !tt.first {
				assert.True(t, <-done, "the whole answer arrives before the entry is stored")
				<-gate.started
				gate.open()
				return
			}
			<-gate.started
			// The answer must not come while the Put waits: give it a
			// moment to show up if it was already sent.
			select {
			case <-done:
				require.Fail(t, "the client had its answer while its entry was still being stored")
			case <-time.After(200 * time.Millisecond):
			}
			gate.open()
			assert.True(t, <-done, "the answer follows its stored entry")
			assert.Zero(t, r.metric("stint_store_pending_writes"), "no write behind the answer")
		})
	}
}

// received reads resp until a client has the whole answer: a plain body to
// its end, a stream up to its final "data: [DONE]" event.
func received(resp *http.Response, stream bool) bool {
	if resp.StatusCode != http.StatusOK {
		return false
	}
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		if stream && sc.Text() == "data: [DONE]" {
			return true
		}
	}
	return !stream && sc.Err() == nil
}
