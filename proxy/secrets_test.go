package proxy_test

import (
	"bytes"
	"context"
	"encoding/base64"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"strings"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// Upstream credentials of the echo tests besides upstreamKey: a second
// upstream's, and one only named to the proxy (STINT_UPSTREAM_KEY when no
// upstream uses it).
const (
	backupKey = "backup-upstream-key-2"
	extraKey  = "extra-env-upstream-key"
)

// leakedForms are the ways an upstream is seen to repeat a key it was
// sent: as is, and base64-encoded, alone, in the bearer header, and as a
// Basic credential.
func leakedForms(secret string) []string {
	var out []string
	for _, s := range []string{secret, "Bearer " + secret, "apikey:" + secret, "user:" + secret} {
		out = append(out, base64.StdEncoding.EncodeToString([]byte(s)), base64.URLEncoding.EncodeToString([]byte(s)), base64.RawStdEncoding.EncodeToString([]byte(s)))
	}
	return append(out, secret)
}

// assertNoSecret checks that what does not hold any form of any key.
func assertNoSecret(t *testing.T, where string, what []byte) {
	t.Helper()
	for _, secret := range []string{upstreamKey, backupKey, extraKey} {
		for _, form := range leakedForms(secret) {
			assert.NotContains(t, string(what), form, "%s holds %q", where, form)
		}
	}
}

// lockedBuffer is a log destination safe for concurrent writers.
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) Bytes() []byte {
	b.mu.Lock()
	defer b.mu.Unlock()
	return bytes.Clone(b.buf.Bytes())
}

// echoedCompletion is a completions answer whose text repeats every key
// (the upstream's own as it received it).
var echoedCompletion = `{"id":"cmpl-echo","object":"text_completion","created":1,"model":"quill-small","choices":[{"text":" you sent ` +
	upstreamtest.AuthPlaceholder + `; also ` + extraKey + `","index":0,"logprobs":null,"finish_reason":"length"}],` +
	`"usage":{"prompt_tokens":3,"completion_tokens":4,"total_tokens":7}}`

// echoedStream is the same answer as an event stream.
var echoedStream = `data: {"id":"cmpl-echo","object":"text_completion","created":1,"model":"quill-small","choices":[{"text":" you sent ` +
	upstreamtest.AuthPlaceholder + `","index":0,"logprobs":null,"finish_reason":null}]}` + "\n\n" +
	`data: {"id":"cmpl-echo","object":"text_completion","created":1,"model":"quill-small","choices":[{"text":" and ` + extraKey +
	`","index":0,"logprobs":null,"finish_reason":"length"}]}` + "\n\n" +
	`data: {"id":"cmpl-echo","object":"text_completion","created":1,"model":"quill-small","choices":[],"usage":{"prompt_tokens":3,"completion_tokens":4,"total_tokens":7}}` + "\n\n" +
	"data: [DONE]\n\n"

func TestUpstreamKeysNeverReachClientsLogsOrStores(t *testing.T) {
	noLeaks(t)
	logs := &lockedBuffer{}
	_, journal := newBoltJournal(t)
	r := newRig(t, func(o *proxy.Options) {
		o.Logger = slog.New(slog.NewTextHandler(logs, &slog.HandlerOptions{Level: slog.LevelDebug}))
		o.Runs = journal
		o.Secrets = []string{extraKey}
	})
	const (
		greedy  = `{"model":"quill-small","prompt":"the %s barge","temperature":0,"max_tokens":4%s}`
		sampled = `{"model":"quill-small","prompt":"the sampled barge","temperature":1,"max_tokens":4}`
		chat    = `{"model":"quill-small","messages":[{"role":"user","content":"hi"}],"temperature":0,"max_tokens":4}`
	)
	tests := []struct {
		name   string
		method string
		path   string
		body   string
		fault  upstreamtest.Fault
		status int
	}{
		{"completion refused", http.MethodPost, "/v1/completions", fmt.Sprintf(greedy, "first", ""), upstreamtest.Fault{Status: 401, EchoAuth: true}, 401},
		{"streamed completion refused", http.MethodPost, "/v1/completions", fmt.Sprintf(greedy, "second", `,"stream":true`), upstreamtest.Fault{Status: 401, EchoAuth: true}, 401},
		{"sampled completion refused", http.MethodPost, "/v1/completions", sampled, upstreamtest.Fault{Status: 401, EchoAuth: true}, 401},
		{"chat refused", http.MethodPost, "/v1/chat/completions", chat, upstreamtest.Fault{Status: 401, EchoAuth: true}, 401},
		{"model list refused", http.MethodGet, "/v1/models", "", upstreamtest.Fault{Path: upstreamtest.PathModels, Status: 401, EchoAuth: true}, 401},
		{"completion echoing the keys", http.MethodPost, "/v1/completions", fmt.Sprintf(greedy, "third", ""), upstreamtest.Fault{Status: 200, EchoAuth: true, Body: echoedCompletion}, 200},
		{"streamed completion echoing the keys", http.MethodPost, "/v1/completions", fmt.Sprintf(greedy, "fourth", `,"stream":true`), upstreamtest.Fault{Status: 200, EchoAuth: true, Body: echoedStream}, 200},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r.up.FailNext(1, tt.fault)
			req, err := http.NewRequest(tt.method, r.srv.URL+tt.path, strings.NewReader(tt.body))
			require.NoError(t, err)
			req.Header.Set("Stint-Run", "echo-run")
			resp, err := http.DefaultClient.Do(req)
			require.NoError(t, err)
			body, err := io.ReadAll(resp.Body)
			resp.Body.Close()
			require.NoError(t, err)
			require.Equal(t, tt.status, resp.StatusCode, "%s", body)
			assertNoSecret(t, "the answer", body)
			var head bytes.Buffer
			require.NoError(t, resp.Header.Write(&head))
			assertNoSecret(t, "the answer's headers", head.Bytes())
			if tt.status == http.StatusOK && tt.path != "/v1/models" {
				again := r.post(tt.path, tt.body)
				require.Equal(t, http.StatusOK, again.status, "%s", again.body)
				assert.Equal(t, proxy.OutcomeHit, again.cache(), "the echoed answer was not cached")
				assertNoSecret(t, "the cached answer", again.body)
			}
		})
	}
	require.NoError(t, r.proxy.Flush(context.Background()))
	var recorded int
	require.NoError(t, journal.Entries(context.Background(), "default", "echo-run", func(e runs.Entry) error {
		_, a, err := journal.Lookup(context.Background(), "default", "echo-run", e.Key, e.Occurrence)
		require.NoError(t, err)
		assertNoSecret(t, "the run journal", a.Body)
		recorded++
		return nil
	}))
	assert.Equal(t, 2, recorded, "the two answered calls are recorded")
	assertNoSecret(t, "the log", logs.Bytes())
}

// TestEveryUpstreamsKeyIsScrubbed routes a model to a second upstream that
// echoes its own key, and has the first upstream repeat the second's.
func TestEveryUpstreamsKeyIsScrubbed(t *testing.T) {
	noLeaks(t)
	backup := upstreamtest.New(upstreamtest.Options{Key: backupKey})
	t.Cleanup(backup.Close)
	r := newRig(t, func(o *proxy.Options) {
		o.Upstreams[0].Models = []string{upstreamtest.ModelSmall}
		o.Upstreams = append(o.Upstreams, proxy.Upstream{Name: "backup", BaseURL: backup.URL(), Key: backupKey, Models: []string{upstreamtest.ModelLarge}})
	})
	backup.FailNext(1, upstreamtest.Fault{Status: 401, EchoAuth: true})
	got := r.complete(`{"model":"quill-large","prompt":"hi","temperature":0,"max_tokens":2}`)
	require.Equal(t, http.StatusUnauthorized, got.status, "%s", got.body)
	assertNoSecret(t, "the second upstream's answer", got.body)

	r.up.FailNext(1, upstreamtest.Fault{Status: 401, Body: `{"error":{"message":"keys seen lately: ` + backupKey + `","type":"invalid_request_error"}}`})
	got = r.complete(`{"model":"quill-small","prompt":"hi","temperature":0,"max_tokens":2}`)
	require.Equal(t, http.StatusUnauthorized, got.status, "%s", got.body)
	assertNoSecret(t, "the first upstream's answer", got.body)
	assert.Equal(t, 1, backup.Calls().Completions)
}
