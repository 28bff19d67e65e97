package main

import (
	"bufio"
	"fmt"
	"io"
	"net"
	"net/http"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestSlowUnauthenticatedBodiesCannotStarveATeam runs stint serve with
// room for only a few dozen open descriptors and opens more connections
// than that, each sending a request with an unknown key and a body it
// never sends. If the proxy held those connections waiting for their
// bodies, it could accept no other; the team's request would never be
// served. Each must get its 401 without having sent a byte of its body,
// and the team's request must be answered while every one of them is
// still held open by its client.
func TestSlowUnauthenticatedBodiesCannotStarveATeam(t *testing.T) {
	const (
		nofile = 40 // the child's descriptor limit
		slow   = 48 // more unauthenticated connections than that
	)
	// liveness only keeps a broken proxy from hanging the test; no
	// duration is measured against it.
	const liveness = 60 * time.Second
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	data := filepath.Join(t.TempDir(), "data")
	key := "lab-slowloris-key"
	cfg := writeConfig(t, configHead(data, up.URL())+fmt.Sprintf("teams:\n  - name: lab\n    keys: [\"sha256:%s\"]\n", keyHash(key)))
	c := startStint(t, []string{fmt.Sprintf("STINT_TEST_NOFILE=%d", nofile)}, "serve", "--config", cfg)

	conns := make([]net.Conn, slow)
	for i := range conns {
		conn, err := net.Dial("tcp", c.addr)
		require.NoError(t, err)
		defer conn.Close() // held open, body never sent, until the test ends
		_, err = fmt.Fprintf(conn, "POST /v1/completions HTTP/1.1\r\nHost: stint\r\nAuthorization: Bearer not-a-key-%d\r\nContent-Type: application/json\r\nContent-Length: 1000\r\n\r\n", i)
		require.NoError(t, err)
		conns[i] = conn
	}

	type answer struct {
		status int
		closed bool
		err    error
	}
	answers := make([]answer, slow)
	var wg sync.WaitGroup
	for i, conn := range conns {
		wg.Go(func() {
			_ = conn.SetReadDeadline(time.Now().Add(liveness))
			br := bufio.NewReader(conn)
			resp, err := http.ReadResponse(br, nil)
			if err != nil {
				answers[i].err = err
				return
			}
			_, _ = io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
			_, err = br.ReadByte()
			answers[i] = answer{status: resp.StatusCode, closed: err == io.EOF}
		})
	}

	client := &http.Client{Timeout: liveness}
	req, err := http.NewRequest(http.MethodPost, "http://"+c.addr+"/v1/completions",
		strings.NewReader(`{"model":"quill-small","prompt":"the barge is loaded","temperature":0,"max_tokens":4}`))
	require.NoError(t, err)
	req.Header.Set("Authorization", "Bearer "+key)
	resp, err := client.Do(req)
	require.NoError(t, err, "the team's request was not answered while the slow clients were held\n%s", c.output())
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	assert.Equal(t, http.StatusOK, resp.StatusCode, "%s", body)

	wg.Wait()
	for i, a := range answers {
		if assert.NoError(t, a.err, "slow client %d got no answer without sending its body", i) {
			assert.Equal(t, http.StatusUnauthorized, a.status, "slow client %d", i)
			assert.True(t, a.closed, "slow client %d: connection left open after the 401", i)
		}
	}
	assert.Equal(t, 1, up.Calls().Completions)
}
