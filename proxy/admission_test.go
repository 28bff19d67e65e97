package proxy_test

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// liveness bounds how long a test waits for an answer that should come at
// once; it only keeps a broken proxy from hanging the test, nothing is
// measured against it.
const liveness = 20 * time.Second

// slowRequest sends a request's header to addr, announcing a body of
// bodyLen bytes that it never sends, and returns the connection.
func slowRequest(t *testing.T, addr, method, path, auth string, bodyLen int) net.Conn {
	t.Helper()
	conn, err := net.Dial("tcp", addr)
	require.NoError(t, err)
	t.Cleanup(func() { conn.Close() })
	head := fmt.Sprintf("%s %s HTTP/1.1\r\nHost: %s\r\nContent-Type: application/json\r\nContent-Length: %d\r\n", method, path, addr, bodyLen)
	if auth != "" {
		head += "Authorization: " + auth + "\r\n"
	}
	_, err = io.WriteString(conn, head+"\r\n")
	require.NoError(t, err)
	return conn
}

// answerWithoutBody reads the answer on a connection whose request body
// was never sent, then checks that the proxy closed the connection.
func answerWithoutBody(t *testing.T, conn net.Conn) (status int, body []byte, closed bool) {
	t.Helper()
	require.NoError(t, conn.SetReadDeadline(time.Now().Add(liveness)))
	br := bufio.NewReader(conn)
	resp, err := http.ReadResponse(br, nil)
	require.NoError(t, err, "no answer while the request body was still owed")
	body, err = io.ReadAll(resp.Body)
	require.NoError(t, err)
	resp.Body.Close()
	_, err = br.ReadByte()
	return resp.StatusCode, body, err == io.EOF
}

func TestUnknownKeyIsAnsweredBeforeTheBodyAndTheConnectionClosed(t *testing.T) {
	noLeaks(t)
	_, j := newBoltJournal(t)
	r := newRig(t, withTeams(teamWithKey("lab", "lab-key")), func(o *proxy.Options) { o.Runs = j })
	addr := strings.TrimPrefix(r.srv.URL, "http://")
	tests := []struct {
		name, method, path, auth, code string
	}{
		{"completions without a key", http.MethodPost, "/v1/completions", "", "missing_key"},
		{"completions with an unknown key", http.MethodPost, "/v1/completions", "Bearer not-a-key", "invalid_key"},
		{"chat with an unknown key", http.MethodPost, "/v1/chat/completions", "Bearer not-a-key", "invalid_key"},
		{"models with an unknown key", http.MethodGet, "/v1/models", "Bearer not-a-key", "invalid_key"},
		{"run import with an unknown key", http.MethodPost, proxy.RunsPrefix + "/import", "Bearer not-a-key", "invalid_key"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			// A body small enough that net/http would otherwise wait
			// for it before answering (it reads up to 256 KiB of an
			// unread body to keep the connection).
			conn := slowRequest(t, addr, tt.method, tt.path, tt.auth, 1000)
			status, body, closed := answerWithoutBody(t, conn)
			assert.Equal(t, http.StatusUnauthorized, status)
			var e struct {
				Error struct {
					Code string `json:"code"`
				} `json:"error"`
			}
			require.NoError(t, json.Unmarshal(body, &e), "body %s", body)
			assert.Equal(t, tt.code, e.Error.Code)
			assert.True(t, closed, "the connection stayed open after the 401")
		})
	}
	assert.Zero(t, r.up.Calls().Total(), "a refused request reached the upstream")
}

func TestInFlightCapPerTeam(t *testing.T) {
	noLeaks(t)
	capped := teamWithKey("lab", "lab-key")
	capped.MaxInFlight = 2
	other := teamWithKey("ops", "ops-key")
	r := newRig(t, withTeams(capped, other), func(o *proxy.Options) { o.MaxInFlight = 8 })
	r.up.Block()
	body := func(i int) string {
		return fmt.Sprintf(`{"model":"quill-small","prompt":"barge %d","temperature":0,"max_tokens":3}`, i)
	}
	var wg sync.WaitGroup
	results := make([]response, 3)
	for i, key := range []string{"lab-key", "lab-key", "ops-key"} {
		wg.Go(func() {
			results[i] = r.postAs(key, "/v1/completions", body(i))
		})
	}
	ctx, cancel := context.WithTimeout(context.Background(), liveness)
	defer cancel()
	require.NoError(t, r.up.AwaitHeld(ctx, 3))

	over := r.postAs("lab-key", "/v1/completions", body(3))
	assert.Equal(t, http.StatusTooManyRequests, over.status, "%s", over.body)
	assert.Equal(t, "1", over.header.Get("Retry-After"))
	assert.Contains(t, string(over.body), `"code":"team_in_flight_limit"`)
	assert.Equal(t, 3, r.up.Calls().Completions, "the refused request reached the upstream")

	r.up.Release()
	wg.Wait()
	for i, res := range results {
		assert.Equal(t, http.StatusOK, res.status, "request %d: %s", i, res.body)
	}
	// The slots are given back: the team is served again.
	again := r.postAs("lab-key", "/v1/completions", body(3))
	assert.Equal(t, http.StatusOK, again.status, "%s", again.body)
}

// postAs posts body to path with key as the bearer key.
func (r *rig) postAs(key, path, body string) response {
	r.t.Helper()
	return r.post(path, body, "Authorization", "Bearer "+key)
}

// serveTimed serves h on a loopback port with the given server timeouts,
// as stint serve does.
func serveTimed(t *testing.T, h http.Handler, read, write time.Duration) *httptest.Server {
	t.Helper()
	srv := httptest.NewUnstartedServer(h)
	srv.Config.ReadHeaderTimeout = read
	srv.Config.ReadTimeout = read
	srv.Config.WriteTimeout = write
	srv.Start()
	t.Cleanup(srv.Close)
	return srv
}

func TestAnswersOutliveServerTimeouts(t *testing.T) {
	noLeaks(t)
	// Read and write timeouts far shorter than the upstream takes to
	// answer: the write timeout bounds each write (so a stream is cut
	// only when its client stops reading), and the read timeout bounds
	// reading the request, not the wait for its answer.
	const timeout = 50 * time.Millisecond
	r := newRig(t, func(o *proxy.Options) { o.WriteTimeout = timeout })
	srv := serveTimed(t, r.proxy, timeout, timeout)
	tests := []struct {
		name, path, body string
		stream           bool
	}{
		{"completion", "/v1/completions", `{"model":"quill-small","prompt":"slow barge","temperature":0,"max_tokens":4}`, false},
		{"streamed completion", "/v1/completions", `{"model":"quill-small","prompt":"slow hive","temperature":0,"max_tokens":4,"stream":true}`, true},
		{"streamed chat, sampled", "/v1/chat/completions", `{"model":"quill-small","messages":[{"role":"user","content":"slow"}],"temperature":1,"max_tokens":4,"stream":true}`, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r.up.FailNext(1, upstreamtest.Fault{Delay: 10 * timeout})
			resp, err := http.Post(srv.URL+tt.path, "application/json", strings.NewReader(tt.body))
			require.NoError(t, err)
			defer resp.Body.Close()
			b, err := io.ReadAll(resp.Body)
			require.NoError(t, err)
			require.Equal(t, http.StatusOK, resp.StatusCode, "%s", b)
			if tt.stream {
				events(t, b) // ends with [DONE]
			} else {
				assert.Len(t, decodeCompletion(t, b).Choices, 1)
			}
		})
	}
}

func TestSlowBodyOfAKnownTeamTimesOut(t *testing.T) {
	noLeaks(t)
	r := newRig(t, withTeams(teamWithKey("lab", "lab-key")))
	srv := serveTimed(t, r.proxy, 100*time.Millisecond, time.Minute)
	conn := slowRequest(t, strings.TrimPrefix(srv.URL, "http://"), http.MethodPost, "/v1/completions", "Bearer lab-key", 1000)
	status, body, _ := answerWithoutBody(t, conn)
	assert.Equal(t, http.StatusRequestTimeout, status, "%s", body)
	assert.Contains(t, string(body), `"code":"body_timeout"`)
}
