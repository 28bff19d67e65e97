package main

import (
	"bufio"
	"io"
	"net/http"
	"strings"
	"sync"
	"syscall"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestKilledUnderLoadLosesNoAnsweredEntry SIGKILLs a serving process on
// the embedded store in the middle of a run of distinct cacheable misses
// from 8 clients (half of them streamed), right after one of them has its
// answer: a new process on the same data dir has every answer any client
// received (a stream: up to its final data: [DONE]) as a hit, so no
// answered call is paid for twice.
func TestKilledUnderLoadLosesNoAnsweredEntry(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	data := t.TempDir()
	args := []string{"serve", "--listen", "127.0.0.1:0", "--upstream", up.URL(), "--data", data}
	first := startStint(t, nil, args...)
	const clients, killAfter = 8, 120
	var (
		mu       sync.Mutex
		answered []int // prompts whose answer a client read whole
		killed   bool
		wg       sync.WaitGroup
	)
	for c := range clients {
		wg.Go(func() {
			stream := c%2 == 1
			for i := c; ; i += clients {
				body := greedyBody(i)
				if stream {
					body = strings.Replace(body, `"temperature"`, `"stream":true,"temperature"`, 1)
				}
				resp, err := http.Post("http://"+first.addr+"/v1/completions", "application/json", strings.NewReader(body))
				if err != nil {
					return // the process is gone
				}
				ok := resp.StatusCode == http.StatusOK && received(resp.Body, stream)
				resp.Body.Close()
				if !ok {
					return
				}
				mu.Lock()
				answered = append(answered, i)
				kill := len(answered) == killAfter && !killed
				killed = killed || kill
				mu.Unlock()
				if kill {
					_ = first.cmd.Process.Signal(syscall.SIGKILL)
					return
				}
			}
		})
	}
	wg.Wait()
	<-first.exited
	require.GreaterOrEqual(t, len(answered), killAfter)
	calls := up.Calls().Completions

	second := startStint(t, nil, args...)
	lost := 0
	for _, i := range answered {
		status, outcome, body := second.complete(t, greedyBody(i))
		require.Equal(t, http.StatusOK, status, "%s", body)
		if outcome != "hit" {
			lost++
		}
	}
	assert.Zero(t, lost, "of %d answered calls, %d were not in the store after SIGKILL", len(answered), lost)
	assert.Equal(t, calls, up.Calls().Completions-lost, "only the lost entries went upstream again")
}

// received reads an answer until a client has it: a plain answer whole, a
// stream up to its final "data: [DONE]" event (as client libraries take a
// stream to be complete), without waiting for the end of the body.
func received(body io.Reader, stream bool) bool {
	if !stream {
		_, err := io.ReadAll(body)
		return err == nil
	}
	sc := bufio.NewScanner(body)
	for sc.Scan() {
		if sc.Text() == "data: [DONE]" {
			return true
		}
	}
	return false
}
