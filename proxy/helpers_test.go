package proxy_test

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/sse"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

const upstreamKey = "upstream-secret-key"

// rig is a proxy in front of the in-test upstream, on a real embedded store.
type rig struct {
	t     *testing.T
	up    *upstreamtest.Server
	srv   *httptest.Server
	proxy *proxy.Proxy
	reg   *prometheus.Registry
	store cache.Store
	key   string // client key sent with every request ("" in open mode)
	opts  *proxy.Options
}

type rigOption func(*proxy.Options)

func newRig(t *testing.T, opts ...rigOption) *rig {
	t.Helper()
	up := upstreamtest.New(upstreamtest.Options{Key: upstreamKey})
	t.Cleanup(up.Close)
	disk, err := boltstore.Open(filepath.Join(t.TempDir(), "stint.db"), boltstore.Options{})
	require.NoError(t, err, "open store")
	store := cache.NewHot(disk, cache.HotOptions{MaxBytes: 8 << 20})
	t.Cleanup(func() { _ = store.Close() }) // stops the tier's goroutines and closes disk
	reg := prometheus.NewRegistry()
	o := proxy.Options{
		Store:      store,
		Upstreams:  []proxy.Upstream{{Name: "fake", BaseURL: up.URL(), Key: upstreamKey, Timeout: 30 * time.Second}},
		Registerer: reg,
		Gatherer:   reg,
	}
	for _, fn := range opts {
		fn(&o)
	}
	p, err := proxy.New(o)
	require.NoError(t, err, "proxy.New")
	t.Cleanup(func() {
		assert.NoError(t, p.Close(context.Background()), "proxy.Close")
	})
	srv := httptest.NewServer(p)
	t.Cleanup(srv.Close)
	r := &rig{t: t, up: up, srv: srv, proxy: p, reg: reg, store: store, opts: &o}
	return r
}

// withTeam configures one team with a key and makes the rig send it.
func withTeams(teams ...proxy.Team) rigOption {
	return func(o *proxy.Options) { o.Teams = teams }
}

func teamWithKey(name, key string) proxy.Team {
	return proxy.Team{Name: name, KeyHashes: [][sha256.Size]byte{sha256.Sum256([]byte(key))}}
}

// response is an answer read whole.
type response struct {
	status  int
	header  http.Header
	body    []byte
	readErr error // the answer broke off while being read
}

func (r response) cache() string { return proxy.CacheOutcome(r.header) }

// detail is the detail parameter of the answer's Cache-Status.
func (r response) detail() string {
	cs, _ := proxy.ParseCacheStatus(r.header)
	return cs.Detail
}

// post sends body to path with optional extra headers (name, value pairs).
func (r *rig) post(path string, body any, headers ...string) response {
	r.t.Helper()
	var raw []byte
	switch b := body.(type) {
	case string:
		raw = []byte(b)
	case []byte:
		raw = b
	default:
		var err error
		raw, err = json.Marshal(b)
		require.NoError(r.t, err, "marshal")
	}
	req, err := http.NewRequest(http.MethodPost, r.srv.URL+path, bytes.NewReader(raw))
	require.NoError(r.t, err)
	req.Header.Set("Content-Type", "application/json")
	if r.key != "" {
		req.Header.Set("Authorization", "Bearer "+r.key)
	}
	for i := 0; i+1 < len(headers); i += 2 {
		req.Header.Set(headers[i], headers[i+1])
	}
	resp, err := http.DefaultClient.Do(req)
	require.NoError(r.t, err, "POST %s", path)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return response{status: resp.StatusCode, header: resp.Header, body: b, readErr: err}
}

func (r *rig) complete(body any, headers ...string) response {
	r.t.Helper()
	return r.post("/v1/completions", body, headers...)
}

func (r *rig) chat(body any, headers ...string) response {
	r.t.Helper()
	return r.post("/v1/chat/completions", body, headers...)
}

// direct asks the upstream itself, bypassing the proxy, for comparison.
func (r *rig) direct(path string, body any) response {
	r.t.Helper()
	raw, _ := json.Marshal(body)
	req, _ := http.NewRequest(http.MethodPost, strings.TrimSuffix(r.up.URL(), "/v1")+path, bytes.NewReader(raw))
	req.Header.Set("Authorization", "Bearer "+upstreamKey)
	resp, err := http.DefaultClient.Do(req)
	require.NoError(r.t, err, "direct")
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return response{status: resp.StatusCode, header: resp.Header, body: b}
}

func (r *rig) upstreamGenerations() int {
	c := r.up.Calls()
	return c.Completions + c.Chat
}

func (r *rig) metric(name string, labels ...string) float64 {
	r.t.Helper()
	mfs, err := r.reg.Gather()
	require.NoError(r.t, err)
	total := 0.0
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	metrics:
		for _, m := range mf.GetMetric() {
			for i := 0; i+1 < len(labels); i += 2 {
				found := false
				for _, lp := range m.GetLabel() {
					if lp.GetName() == labels[i] && lp.GetValue() == labels[i+1] {
						found = true
					}
				}
				if !found {
					continue metrics
				}
			}
			switch {
			case m.Counter != nil:
				total += m.Counter.GetValue()
			case m.Gauge != nil:
				total += m.Gauge.GetValue()
			}
		}
	}
	return total
}

// completion is the part of a completions answer the tests read.
type completion struct {
	ID      string `json:"id"`
	Object  string `json:"object"`
	Model   string `json:"model"`
	Choices []struct {
		Text         string        `json:"text"`
		Index        int           `json:"index"`
		FinishReason string        `json:"finish_reason"`
		Logprobs     *completionLP `json:"logprobs"`
	} `json:"choices"`
	Usage struct {
		PromptTokens     int `json:"prompt_tokens"`
		CompletionTokens int `json:"completion_tokens"`
		TotalTokens      int `json:"total_tokens"`
	} `json:"usage"`
}

type completionLP struct {
	Tokens        []string             `json:"tokens"`
	TokenLogprobs []*float64           `json:"token_logprobs"`
	TopLogprobs   []map[string]float64 `json:"top_logprobs"`
	TextOffset    []int                `json:"text_offset"`
}

func decodeCompletion(t *testing.T, b []byte) completion {
	t.Helper()
	var c completion
	require.NoError(t, json.Unmarshal(b, &c), "decode completion %s", b)
	return c
}

type chatAnswer struct {
	Choices []struct {
		Index   int `json:"index"`
		Message struct {
			Role    string `json:"role"`
			Content string `json:"content"`
		} `json:"message"`
		Logprobs *struct {
			Content []struct {
				Token       string `json:"token"`
				Logprob     float64
				TopLogprobs []struct {
					Token   string  `json:"token"`
					Logprob float64 `json:"logprob"`
				} `json:"top_logprobs"`
			} `json:"content"`
		} `json:"logprobs"`
		FinishReason string `json:"finish_reason"`
	} `json:"choices"`
	Usage struct {
		PromptTokens     int `json:"prompt_tokens"`
		CompletionTokens int `json:"completion_tokens"`
	} `json:"usage"`
}

func decodeChat(t *testing.T, b []byte) chatAnswer {
	t.Helper()
	var c chatAnswer
	require.NoError(t, json.Unmarshal(b, &c), "decode chat %s", b)
	return c
}

// events parses an event stream body into its data payloads, checking it
// ends with [DONE].
func events(t *testing.T, body []byte) []string {
	t.Helper()
	rd := sse.NewReader(bytes.NewReader(body))
	var out []string
	for {
		ev, err := rd.Next()
		if err == io.EOF {
			break
		}
		require.NoError(t, err, "read stream: %v\n%s", err, body)
		out = append(out, ev.Data)
	}
	require.NotEqual(t, 0, len(out), "stream does not end with [DONE]:\n%s", body)
	require.Equal(t, sse.Done, out[len(out)-1], "stream does not end with [DONE]:\n%s", body)
	return out[:len(out)-1]
}

// streamedCompletionText joins a completions stream's text per choice index.
func streamedText(t *testing.T, chat bool, datas []string) (map[int]string, *completion) {
	t.Helper()
	texts := map[int]string{}
	var usageChunk *completion
	for _, d := range datas {
		var c struct {
			Choices []struct {
				Index int    `json:"index"`
				Text  string `json:"text"`
				Delta struct {
					Content string `json:"content"`
				} `json:"delta"`
			} `json:"choices"`
			Usage json.RawMessage `json:"usage"`
		}
		require.NoError(t, json.Unmarshal([]byte(d), &c), "chunk %s", d)
		if len(c.Choices) == 0 && len(c.Usage) > 0 && string(c.Usage) != "null" {
			u := decodeCompletion(t, []byte(d))
			usageChunk = &u
		}
		for _, ch := range c.Choices {
			if chat {
				texts[ch.Index] += ch.Delta.Content
			} else {
				texts[ch.Index] += ch.Text
			}
		}
	}
	return texts, usageChunk
}

func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	for !cond() {
		select {
		case <-ctx.Done():
			require.Failf(t, "timed out", "timed out waiting for %s", what)
		case <-time.After(time.Millisecond):
		}
	}
}
