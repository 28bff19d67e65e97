package main

import (
	"fmt"
	"net/http"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestReplicasShareTheBreakerOnRedis runs two stint serve processes on one
// real Redis in front of a failing upstream: the failures replica A sees
// trip the breaker, and replica B then answers 503 with Retry-After without
// calling the upstream at all.
func TestReplicasShareTheBreakerOnRedis(t *testing.T) {
	rs := redistest.Start(t)
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	config := func() string {
		return writeConfig(t, fmt.Sprintf(`listen: 127.0.0.1:0
data: %s
upstreams:
  - name: fake
    url: %s
    breaker: {consecutive_failures: 3, failure_ratio: -1, open_for: 1m}
    retry: {attempts: 1}
store:
  redis:
    addrs: [%q]
    timeout: 300ms
`, t.TempDir(), up.URL(), rs.Addr))
	}
	a := startStint(t, nil, "serve", "--config", config())
	b := startStint(t, nil, "serve", "--config", config())
	up.FailRatio(1, upstreamtest.Fault{Status: http.StatusBadGateway})
	for i := range 3 {
		status, _, body := a.complete(t, greedyBody(i))
		require.Equal(t, http.StatusBadGateway, status, "A call %d: %d %s, want the upstream's 502", i, status, body)
	}
	resp, err := http.Post("http://"+b.addr+"/v1/completions", "application/json", strings.NewReader(greedyBody(99)))
	require.NoError(t, err)
	resp.Body.Close()
	ra, _ := strconv.Atoi(resp.Header.Get("Retry-After"))
	require.Falsef(t, resp.StatusCode != http.StatusServiceUnavailable || ra < 1 || ra > 60, "B after A tripped: %d Retry-After %q, want 503 with 1..60", resp.StatusCode, resp.Header.Get("Retry-After"))
	n := up.Calls().Completions
	assert.Equal(t, 3, n, "upstream calls %d, want 3 (none from B)", n)
}
