package proxy_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

func TestBadRequestsGetWireErrors(t *testing.T) {
	noLeaks(t)
	r := newRig(t, func(o *proxy.Options) { o.MaxBodyBytes = 4096 })
	tests := []struct {
		name   string
		path   string
		body   string
		status int
		param  string
	}{
		{"malformed JSON", "/v1/completions", `{"model": "quill-small", "prompt": `, 400, ""},
		{"not an object", "/v1/completions", `["model"]`, 400, ""},
		{"trailing data", "/v1/completions", `{"model":"quill-small","prompt":"a"} {}`, 400, ""},
		{"missing model", "/v1/completions", `{"prompt":"a"}`, 400, "model"},
		{"duplicate member (RFC 8785 §3.1, I-JSON)", "/v1/completions", `{"model":"quill-small","prompt":"a","prompt":"b"}`, 400, ""},
		{"nested duplicate member", "/v1/completions", `{"model":"quill-small","prompt":"a","x":{"k":1,"k":2}}`, 400, ""},
		{"model not a string", "/v1/completions", `{"model":7,"prompt":"a"}`, 400, "model"},
		{"missing prompt", "/v1/completions", `{"model":"quill-small"}`, 400, "prompt"},
		{"prompt wrong type", "/v1/completions", `{"model":"quill-small","prompt":{"a":1}}`, 400, "prompt"},
		{"prompt mixed array", "/v1/completions", `{"model":"quill-small","prompt":["a",3]}`, 400, "prompt"},
		{"negative max_tokens", "/v1/completions", `{"model":"quill-small","prompt":"a","max_tokens":-1}`, 400, "max_tokens"},
		{"absurd max_tokens", "/v1/completions", `{"model":"quill-small","prompt":"a","max_tokens":1e12}`, 400, "max_tokens"},
		{"fractional max_tokens", "/v1/completions", `{"model":"quill-small","prompt":"a","max_tokens":2.5}`, 400, "max_tokens"},
		{"string max_tokens", "/v1/completions", `{"model":"quill-small","prompt":"a","max_tokens":"8"}`, 400, "max_tokens"},
		{"negative logprobs", "/v1/completions", `{"model":"quill-small","prompt":"a","logprobs":-2}`, 400, "logprobs"},
		{"absurd logprobs", "/v1/completions", `{"model":"quill-small","prompt":"a","logprobs":100000000}`, 400, "logprobs"},
		{"negative temperature", "/v1/completions", `{"model":"quill-small","prompt":"a","temperature":-1}`, 400, "temperature"},
		{"n zero", "/v1/completions", `{"model":"quill-small","prompt":"a","n":0}`, 400, "n"},
		{"stream not bool", "/v1/completions", `{"model":"quill-small","prompt":"a","stream":"yes"}`, 400, "stream"},
		{"chat missing messages", "/v1/chat/completions", `{"model":"quill-small"}`, 400, "messages"},
		{"chat empty messages", "/v1/chat/completions", `{"model":"quill-small","messages":[]}`, 400, "messages"},
		{"chat top_logprobs without logprobs", "/v1/chat/completions", `{"model":"quill-small","messages":[{"role":"user","content":"a"}],"top_logprobs":2}`, 400, "top_logprobs"},
		{"body too large", "/v1/completions", `{"model":"quill-small","prompt":"` + strings.Repeat("a", 5000) + `"}`, 413, ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := r.post(tt.path, tt.body)
			require.Equal(t, tt.status, got.status, "status %d, want %d: %s", got.status, tt.status, got.body)
			var e struct {
				Error struct {
					Message string  `json:"message"`
					Type    string  `json:"type"`
					Param   *string `json:"param"`
					Code    *string `json:"code"`
				} `json:"error"`
			}
			require.NoError(t, json.Unmarshal(got.body, &e), "not the wire error shape: %s", got.body)
			require.NotEqual(t, "", e.Error.Message, "no error message: %s", got.body)
			require.NotEqual(t, "", e.Error.Type, "no error type: %s", got.body)
			assert.False(t, tt.param != "" && (e.Error.Param == nil || *e.Error.Param != tt.param), "param %v, want %q", e.Error.Param, tt.param)
		})
	}
	assert.Equal(t, 0, r.upstreamGenerations(), "bad requests reached the upstream %d times", r.upstreamGenerations())
}

func TestUnknownKeyIs401(t *testing.T) {
	noLeaks(t)
	r := newRig(t, withTeams(teamWithKey("lab", "good-key")))
	for _, key := range []string{"", "wrong-key"} {
		r.key = key
		got := r.complete(greedy("a"))
		assert.Equal(t, http.StatusUnauthorized, got.status, "key %q: status %d, want 401", key, got.status)
	}
	r.key = "good-key"
	got := r.complete(greedy("a"))
	assert.Equal(t, http.StatusOK, got.status, "good key: status %d", got.status)
}

func TestConcurrentIdenticalMissesMakeOneCall(t *testing.T) {
	noLeaks(t)
	r := newRig(t)
	r.up.Block()
	const clients = 64
	var wg sync.WaitGroup
	bodies := make([][]byte, clients)
	outcomes := make([]string, clients)
	for i := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			got := r.complete(greedy("sixty-four keepers ask at once"))
			bodies[i], outcomes[i] = got.body, got.cache()
		}()
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	require.NoError(t, r.up.AwaitHeld(ctx, 1))
	waitFor(t, "63 coalesced waiters", func() bool { return r.metric("stint_coalesced_waiting") == clients-1 })
	r.up.Release()
	wg.Wait()
	got := r.upstreamGenerations()
	require.Equal(t, 1, got, "upstream calls = %d, want 1", got)
	misses, shared := 0, 0
	for i := range clients {
		require.Equal(t, string(bodies[0]), string(bodies[i]), "client %d got a different answer", i)
		switch outcomes[i] {
		case proxy.OutcomeMiss:
			misses++
		case proxy.OutcomeShared:
			shared++
		}
	}
	assert.Equal(t, 1, misses, "outcomes: %d miss, %d shared; want 1 and %d", misses, shared, clients-1)
	assert.Equal(t, clients-1, shared, "outcomes: %d miss, %d shared; want 1 and %d", misses, shared, clients-1)
}

func TestNothingIsCachedFromAFailedCall(t *testing.T) {
	noLeaks(t)
	r := newRig(t)
	r.up.FailNext(1, upstreamtest.Fault{Status: http.StatusTooManyRequests, RetryAfter: "7", Body: `{"error":{"message":"slow down","type":"rate_limit","code":"rate_limited"}}`})
	got := r.complete(greedy("queen cell"))
	require.Equal(t, http.StatusTooManyRequests, got.status, "upstream 429 not passed through: %d %q %s", got.status, got.header.Get("Retry-After"), got.body)
	require.Equal(t, "7", got.header.Get("Retry-After"), "upstream 429 not passed through: %d %q %s", got.status, got.header.Get("Retry-After"), got.body)
	require.Contains(t, string(got.body), "slow down", "upstream 429 not passed through: %d %q %s", got.status, got.header.Get("Retry-After"), got.body)
	again := r.complete(greedy("queen cell"))
	require.Equal(t, http.StatusOK, again.status, "after a failed call: %d %q, want 200 miss", again.status, again.cache())
	require.Equal(t, proxy.OutcomeMiss, again.cache(), "after a failed call: %d %q, want 200 miss", again.status, again.cache())
}

func TestUpstreamUnreachableOrSlow(t *testing.T) {
	noLeaks(t)
	t.Run("unreachable", func(t *testing.T) {
		r := newRig(t)
		r.up.Close()
		got := r.complete(greedy("x"))
		require.Equal(t, http.StatusBadGateway, got.status, "status %d, want 502: %s", got.status, got.body)
	})
	t.Run("timeout", func(t *testing.T) {
		r := newRig(t, func(o *proxy.Options) { o.Upstreams[0].Timeout = 200 * time.Millisecond })
		r.up.FailNext(1, upstreamtest.Fault{Hang: true})
		got := r.complete(greedy("x"))
		require.Equal(t, http.StatusGatewayTimeout, got.status, "status %d, want 504: %s", got.status, got.body)
		again := r.complete(greedy("x"))
		require.Equal(t, proxy.OutcomeMiss, again.cache(), "after timeout: %d %q", again.status, again.cache())
		require.Equal(t, http.StatusOK, again.status, "after timeout: %d %q", again.status, again.cache())
	})
}

func TestHealthReadyMetrics(t *testing.T) {
	noLeaks(t)
	r := newRig(t)
	r.complete(greedy("metrics please"))
	r.complete(greedy("metrics please"))
	for _, path := range []string{"/healthz", "/readyz", "/metrics"} {
		resp, err := http.Get(r.srv.URL + path)
		require.NoError(t, err)
		resp.Body.Close()
		assert.Equal(t, http.StatusOK, resp.StatusCode, "%s: %d", path, resp.StatusCode)
	}
	got := r.metric("stint_requests_total", "cache", "hit")
	assert.Equal(t, float64(1), got, "stint_requests_total{cache=hit} = %v, want 1", got)
	r.proxy.Drain()
	resp, err := http.Get(r.srv.URL + "/readyz")
	require.NoError(t, err)
	resp.Body.Close()
	assert.Equal(t, http.StatusServiceUnavailable, resp.StatusCode, "/readyz while draining: %d, want 503", resp.StatusCode)
}

func TestCutShortAnswersAreNotCached(t *testing.T) {
	noLeaks(t)
	for _, tc := range []struct {
		name   string
		stream bool
	}{{"plain", false}, {"streamed", true}} {
		t.Run(tc.name, func(t *testing.T) {
			r := newRig(t)
			r.up.FailNext(1, upstreamtest.Fault{Cut: 3})
			body := greedy("the hive went quiet", "max_tokens", 12, "stream", tc.stream)
			got := r.complete(body)
			require.False(t, got.status == http.StatusOK && got.readErr == nil, "a cut-short answer reached the client as a whole one: %s", got.body)
			again := r.complete(body)
			require.Equal(t, http.StatusOK, again.status, "after a cut-short answer: %d %q, want 200 miss (nothing stored)", again.status, again.cache())
			require.Equal(t, proxy.OutcomeMiss, again.cache(), "after a cut-short answer: %d %q, want 200 miss (nothing stored)", again.status, again.cache())
		})
	}
}

// TestNoRequestOutlivesItsDeadline puts the proxy under concurrent load in
// front of an upstream that fails in every way the fake can (5xx at a
// ratio, 429 with Retry-After, hangs, resets, slow answers), with retries
// on the real clock and a concurrency cap, once with the breaker off (every
// request meets the faults) and once with a breaker that trips and
// recovers during the run. Every client request carries a deadline of the
// upstream timeout plus a margin: each must get a whole HTTP answer from
// the proxy before it; none may end in the client's own
// context.DeadlineExceeded.
func TestNoRequestOutlivesItsDeadline(t *testing.T) {
	// The routed upstream's timeout bounds a request's whole upstream
	// exchange: the slot wait, every attempt, the retry waits and reading
	// the answer (README, "When the upstream fails"; proxy/resilience.go).
	// The margin is shorter than the timeout itself, so an exchange that
	// ran the timeout over twice (an attempt's own timeout escaping the
	// exchange's bound, say: a hang held 3x the timeout failed this test)
	// misses the client's deadline.
	const (
		timeout  = time.Second
		margin   = 800 * time.Millisecond
		workers  = 12
		each     = 10
		prompts  = 40 // fewer than requests: repeats coalesce or hit
		slotsCap = 3
	)
	tests := []struct {
		name    string
		breaker breaker.Settings
		// mustSee are statuses some client must get, so the load really
		// ran through the faults the proxy does not retry.
		mustSee []int
	}{
		{"breaker off", breaker.Settings{Off: true}, []int{200, 429, 500, 504}},
		// Trips after 4 failures in a row; a short open time lets probes
		// through, and closes it again, within the run.
		{"breaker tripping", breaker.Settings{ConsecutiveFailures: 4, FailureRatio: -1, OpenFor: 200 * time.Millisecond}, []int{200}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			r := newRig(t, func(o *proxy.Options) {
				u := &o.Upstreams[0]
				u.Timeout = timeout
				u.MaxConcurrent = slotsCap
				u.Breaker = tt.breaker
				// Retries keep package retry's defaults: 3 calls, full
				// jitter from 250 ms, on the real clock.
			})
			// Each call takes the first rule that picks it; a ratio counts
			// the calls that reach its rule. About half the calls fail.
			for _, rule := range []struct {
				ratio float64
				fault upstreamtest.Fault
			}{
				{0.2, upstreamtest.Fault{Status: http.StatusInternalServerError}},
				// A Retry-After as long as the timeout cannot be waited
				// for: passed through.
				{0.2, upstreamtest.Fault{Status: http.StatusTooManyRequests, RetryAfter: "1"}},
				// Retried at once.
				{0.2, upstreamtest.Fault{Status: http.StatusServiceUnavailable, RetryAfter: "0"}},
				{0.15, upstreamtest.Fault{Hang: true}},
				{0.2, upstreamtest.Fault{Reset: true}},
				{0.2, upstreamtest.Fault{Delay: 100 * time.Millisecond}}, // slow, then a good answer
			} {
				r.up.FailRatio(rule.ratio, rule.fault)
			}
			tr := &http.Transport{MaxIdleConnsPerHost: workers}
			t.Cleanup(tr.CloseIdleConnections)
			client := &http.Client{Transport: tr}

			type result struct {
				status int
				err    error
			}
			results := make([]result, workers*each)
			var wg sync.WaitGroup
			for w := range workers {
				wg.Go(func() {
					for i := range each {
						n := w*each + i
						body, _ := json.Marshal(greedy(fmt.Sprintf("deadline load %d", n%prompts), "stream", n%3 == 0))
						results[n].status, results[n].err = postWithin(client, r.srv.URL+"/v1/completions", body, timeout+margin)
					}
				})
			}
			wg.Wait()

			// What the proxy may answer here (README, "When the upstream
			// fails" and "Errors"): the answer, the upstream's 500 or 429
			// passed through, 502 for a reset, 503 (the upstream's,
			// upstream_busy or upstream_circuit_open), 504 for a hang.
			allowed := map[int]bool{200: true, 429: true, 500: true, 502: true, 503: true, 504: true}
			seen := map[int]int{}
			for n, res := range results {
				switch {
				case errors.Is(res.err, context.DeadlineExceeded):
					assert.Failf(t, "request outlived its deadline", "request %d outlived its deadline of the timeout %v + %v: %v", n, timeout, margin, res.err)
				case res.err != nil:
					assert.Failf(t, "request got no whole answer", "request %d: %v", n, res.err)
				case !allowed[res.status]:
					assert.Failf(t, "unexpected status", "request %d: status %d, want one of %v", n, res.status, allowed)
				}
				seen[res.status]++
			}
			for _, status := range tt.mustSee {
				assert.NotEqual(t, 0, seen[status], "no request answered %d (statuses seen: %v)", status, seen)
			}
			t.Logf("statuses %v over %d upstream calls", seen, r.upstreamGenerations())
		})
	}
}

// postWithin posts body to url under a deadline d from now and reads the
// whole answer; err is the transport's or the body read's error.
func postWithin(c *http.Client, url string, body []byte, d time.Duration) (status int, err error) {
	ctx, cancel := context.WithTimeout(context.Background(), d)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, url, bytes.NewReader(body))
	if err != nil {
		return 0, err
	}
	req.Header.Set("Content-Type", "application/json")
	resp, err := c.Do(req)
	if err != nil {
		return 0, err
	}
	defer resp.Body.Close()
	if _, err := io.Copy(io.Discard, resp.Body); err != nil {
		return resp.StatusCode, err
	}
	return resp.StatusCode, nil
}
