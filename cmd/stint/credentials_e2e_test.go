package main

import (
	"bytes"
	"context"
	"encoding/base64"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"io/fs"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/klauspost/compress/s2"
	"github.com/klauspost/compress/zstd"
	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// The secrets of the credential test. Each holds characters that JSON
// (with Go's HTML escaping), URL encoding and base64 all change, so every
// encoded form differs from the raw one.
const (
	credMainKey   = "sk-main/Upstream+Secret&<7Hq2>=Zw91xK"   // STINT_UPSTREAM_KEY
	credSecondKey = "sk-second/Upstream+Secret&<4Rt8>=Mn53pL" // key_env of the second upstream
	credSecondEnv = "STINT_SECOND_UPSTREAM_KEY"
	credLabKey    = "sk-lab/Client+Key&<2Jd6>=Vb17qW"
	credThriftKey = "sk-thrift/Client+Key&<8Kp3>=Xc44rT"
	credSlowKey   = "sk-slow/Client+Key&<5Ls9>=Yd82sU"
	credAdminKey  = "sk-admin/Client+Key&<3Mf1>=Ze26tV"
)

// secretForms are the ways a secret could be written out: as is,
// JSON-escaped (with and without HTML escaping, and with "\/"), URL-encoded
// (query and path), hex, and base64 (standard, URL-safe, with and without
// padding) of the secret at each of the three byte alignments, of
// "Bearer <secret>" and of the Basic credential "apikey:<secret>".
func secretForms(secret string) map[string]string {
	forms := map[string]string{"as is": secret}
	j, _ := json.Marshal(secret)
	forms["JSON-escaped"] = string(j[1 : len(j)-1])
	var raw bytes.Buffer
	enc := json.NewEncoder(&raw)
	enc.SetEscapeHTML(false)
	_ = enc.Encode(secret)
	s := strings.TrimSpace(raw.String())
	forms["JSON-escaped, no HTML escapes"] = s[1 : len(s)-1]
	forms["JSON-escaped with \\/"] = strings.ReplaceAll(forms["JSON-escaped"], "/", `\/`)
	forms["URL query-encoded"] = url.QueryEscape(secret)
	forms["URL path-encoded"] = url.PathEscape(secret)
	forms["hex"] = hex.EncodeToString([]byte(secret))
	forms["hex, upper case"] = strings.ToUpper(hex.EncodeToString([]byte(secret)))
	for name, e := range map[string]*base64.Encoding{"base64": base64.StdEncoding, "base64url": base64.URLEncoding} {
		for _, wrapped := range []string{secret, "Bearer " + secret, "apikey:" + secret} {
			forms[name+" of "+strings.TrimSuffix(wrapped, secret)+"<key>"] = strings.TrimRight(e.EncodeToString([]byte(wrapped)), "=")
		}
		// The secret starting at byte 1 or 2 of a group of three: the
		// groups that hold only the secret's bytes.
		for off := 1; off <= 2; off++ {
			b := append(bytes.Repeat([]byte{0}, off), secret...)
			full := len(b) / 3 * 4
			forms[fmt.Sprintf("%s of <key> at alignment %d", name, off)] = e.EncodeToString(b)[4:full]
		}
	}
	return forms
}

// evidence is every byte a proxy produced, by where it was found.
type evidence struct {
	mu    sync.Mutex
	parts []evidencePart
}

type evidencePart struct {
	where string
	data  []byte
}

func (e *evidence) add(where string, data []byte) {
	data = bytes.Clone(data) // bbolt's values live in its mmap, gone once the file is closed
	e.mu.Lock()
	defer e.mu.Unlock()
	for i, d := range expand(data) {
		w := where
		if i > 0 {
			w += " (decompressed)"
		}
		e.parts = append(e.parts, evidencePart{w, d})
	}
}

// addResponse adds an answer's status line, headers and body.
func (e *evidence) addResponse(where string, resp *http.Response, body []byte) {
	var b bytes.Buffer
	fmt.Fprintf(&b, "%s\n", resp.Status)
	_ = resp.Header.Write(&b)
	_ = resp.Trailer.Write(&b)
	b.Write(body)
	e.add(where, b.Bytes())
}

// find returns, for each form of secret found, the places it was found.
func (e *evidence) find(secret string) []string {
	e.mu.Lock()
	defer e.mu.Unlock()
	var found []string
	for name, form := range secretForms(secret) {
		for _, p := range e.parts {
			if bytes.Contains(p.data, []byte(form)) {
				found = append(found, fmt.Sprintf("%s in %s", name, p.where))
			}
		}
	}
	sort.Strings(found)
	return found
}

// decompressed counts the parts decompressed from places whose names
// begin with prefix.
func (e *evidence) decompressed(prefix string) int {
	e.mu.Lock()
	defer e.mu.Unlock()
	n := 0
	for _, p := range e.parts {
		if strings.HasPrefix(p.where, prefix) && strings.HasSuffix(p.where, " (decompressed)") {
			n++
		}
	}
	return n
}

// contains reports whether any part holds text.
func (e *evidence) contains(text string) bool {
	e.mu.Lock()
	defer e.mu.Unlock()
	for _, p := range e.parts {
		if bytes.Contains(p.data, []byte(text)) {
			return true
		}
	}
	return false
}

// expand returns b and every decompression of a part of it that succeeds:
// S2 blocks after a header of up to 32 bytes (the stores' record formats),
// and zstd streams from each zstd magic number on (the embedded store's
// records, run archives).
func expand(b []byte) [][]byte {
	out := [][]byte{b}
	for off := 0; off <= 32 && off < len(b); off++ {
		if n, err := s2.DecodedLen(b[off:]); err == nil && n > 0 && n < 64<<20 {
			if d, err := s2.Decode(nil, b[off:]); err == nil {
				out = append(out, d)
			}
		}
	}
	magic := []byte{0x28, 0xb5, 0x2f, 0xfd}
	for i := 0; ; {
		j := bytes.Index(b[i:], magic)
		if j < 0 {
			break
		}
		i += j
		if zr, err := zstd.NewReader(bytes.NewReader(b[i:]), zstd.WithDecoderConcurrency(1)); err == nil {
			d, _ := io.ReadAll(io.LimitReader(zr, 64<<20)) // what decoded before an error counts too
			zr.Close()
			if len(d) > 0 {
				out = append(out, d)
			}
		}
		i += len(magic)
	}
	return out
}

// addDataDir adds every file under dir as it lies on disk and, for bbolt
// files, every bucket name, key and value in them.
func (e *evidence) addDataDir(t *testing.T, dir string) (files int) {
	t.Helper()
	require.NoError(t, filepath.WalkDir(dir, func(path string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		raw, err := os.ReadFile(path)
		if err != nil {
			return err
		}
		files++
		e.add("file "+path, raw)
		db, err := bbolt.Open(path, 0o600, &bbolt.Options{ReadOnly: true, Timeout: time.Second})
		if err != nil {
			return nil // not a bbolt file
		}
		defer db.Close()
		return db.View(func(tx *bbolt.Tx) error {
			return tx.ForEach(func(name []byte, b *bbolt.Bucket) error {
				e.addBucket(fmt.Sprintf("bbolt %s bucket %s", path, name), b)
				return nil
			})
		})
	}))
	return files
}

func (e *evidence) addBucket(where string, b *bbolt.Bucket) {
	_ = b.ForEach(func(k, v []byte) error {
		e.add(where+" key", k)
		if v == nil {
			if nb := b.Bucket(k); nb != nil {
				e.addBucket(fmt.Sprintf("%s/%s", where, k), nb)
			}
			return nil
		}
		e.add(fmt.Sprintf("%s value of %q", where, k), v)
		return nil
	})
}

// addRedis adds every key in rdb and its whole value, read by its type.
func (e *evidence) addRedis(t *testing.T, rdb *redis.Client) (keys int) {
	t.Helper()
	ctx := context.Background()
	iter := rdb.Scan(ctx, 0, "*", 1000).Iterator()
	for iter.Next(ctx) {
		k := iter.Val()
		keys++
		where := "redis key " + k
		e.add(where+" (name)", []byte(k))
		typ, err := rdb.Type(ctx, k).Result()
		require.NoError(t, err, k)
		var parts []string
		switch typ {
		case "string":
			v, err := rdb.Get(ctx, k).Result()
			if err == redis.Nil {
				continue // expired since the scan
			}
			require.NoError(t, err, k)
			parts = []string{v}
		case "hash":
			m, err := rdb.HGetAll(ctx, k).Result()
			require.NoError(t, err, k)
			for f, v := range m {
				parts = append(parts, f, v)
			}
		case "list":
			parts, err = rdb.LRange(ctx, k, 0, -1).Result()
			require.NoError(t, err, k)
		case "set":
			parts, err = rdb.SMembers(ctx, k).Result()
			require.NoError(t, err, k)
		case "zset":
			parts, err = rdb.ZRange(ctx, k, 0, -1).Result()
			require.NoError(t, err, k)
		case "stream":
			msgs, err := rdb.XRange(ctx, k, "-", "+").Result()
			require.NoError(t, err, k)
			for _, m := range msgs {
				parts = append(parts, fmt.Sprint(m.Values))
			}
		case "none":
			continue
		default:
			require.FailNowf(t, "unread redis type", "redis key %s of type %s: the test does not read that type", k, typ)
		}
		for _, p := range parts {
			e.add(where, []byte(p))
		}
	}
	require.NoError(t, iter.Err())
	return keys
}

// TestSecretsNeverLeave runs stint serve with distinctive upstream keys (in
// STINT_UPSTREAM_KEY and in a second upstream's key_env) and client keys,
// on the embedded store (JSON logs) and on a real Redis (text logs), both
// with --log-prompts; drives traffic through every outcome and failure
// the proxy has; and then searches every byte it produced (answers'
// headers and bodies, its log, every file under --data, every Redis key
// and value, the exported run archive, compressed parts decompressed) for
// each key in every form secretForms names. Client keys may be stored
// only as hashes, so they must not be found either.
func TestSecretsNeverLeave(t *testing.T) {
	t.Run("forms are found", func(t *testing.T) {
		// The search itself finds each form in bytes that hold it, and the
		// key in a compressed record.
		for name, form := range secretForms(credMainKey) {
			var e evidence
			e.add("bytes", []byte("prefix "+form+" suffix"))
			assert.Contains(t, e.find(credMainKey), name+" in bytes")
		}
		var e evidence
		e.add("record", append(make([]byte, 14), s2.Encode(nil, []byte("x "+credMainKey))...))
		assert.Contains(t, e.find(credMainKey), "as is in record (decompressed)")
	})
	for _, backend := range []struct{ name, logFormat string }{{"embedded", "json"}, {"redis", "text"}} {
		t.Run(backend.name, func(t *testing.T) {
			t.Parallel()
			secretsRun(t, backend.name == "redis", backend.logFormat)
		})
	}
}

func secretsRun(t *testing.T, onRedis bool, logFormat string) {
	main := upstreamtest.New(upstreamtest.Options{Key: credMainKey, Models: []string{upstreamtest.ModelSmall}})
	defer main.Close()
	second := upstreamtest.New(upstreamtest.Options{Key: credSecondKey, Models: []string{upstreamtest.ModelLarge}})
	defer second.Close()
	data := filepath.Join(t.TempDir(), "data")
	var store string
	var rdb *redis.Client
	if onRedis {
		rs := redistest.Start(t)
		rdb = rs.Client(t)
		store = fmt.Sprintf("store:\n  redis:\n    addrs: [%q]\n    timeout: 500ms\n", rs.Addr)
	}
	cfg := writeConfig(t, fmt.Sprintf(`listen: 127.0.0.1:0
data: %s
upstreams:
  - name: main
    url: %s
    key_env: STINT_UPSTREAM_KEY
    models: [quill-small]
    timeout: 3s
    retry: {attempts: 1}
  - name: second
    url: %s
    key_env: %s
    models: [quill-large]
    retry: {attempts: 1}
    breaker: {consecutive_failures: 2, failure_ratio: -1, open_for: 1m, probe_every: 0s}
teams:
  - name: lab
    keys: ["sha256:%s"]
    budget: {usd: 10.00, per: month}
  - name: thrift
    keys: ["sha256:%s"]
    budget: {usd: 0.000001, per: total}
  - name: slow
    keys: ["sha256:%s"]
    limits: {requests_per_minute: 1}
prices:
  quill-small: {input: 2.0, output: 6.0}   # invented test prices
  quill-large: {input: 3.0, output: 9.0}   # invented test prices
budget:
  max_wait: 0s
server:
  max_body_bytes: 64KiB
admin:
  keys: ["sha256:%s"]
%s`, data, main.URL(), second.URL(), credSecondEnv,
		keyHash(credLabKey), keyHash(credThriftKey), keyHash(credSlowKey), keyHash(credAdminKey), store))
	c := startStint(t, []string{"STINT_UPSTREAM_KEY=" + credMainKey, credSecondEnv + "=" + credSecondKey},
		"serve", "--config", cfg, "--log-format", logFormat, "--log-prompts")
	base := "http://" + c.addr
	var ev evidence

	// do sends one request and adds its answer to the evidence.
	do := func(t *testing.T, name, method, path, auth, body string, header ...string) (int, http.Header, []byte) {
		t.Helper()
		// assert, not require: the coalesced calls run do off the test's goroutine.
		req, err := http.NewRequest(method, base+path, strings.NewReader(body))
		if !assert.NoError(t, err, name) {
			return 0, nil, nil
		}
		if auth != "" {
			req.Header.Set("Authorization", auth)
		}
		if body != "" {
			req.Header.Set("Content-Type", "application/json")
		}
		for i := 0; i+1 < len(header); i += 2 {
			req.Header.Set(header[i], header[i+1])
		}
		resp, err := http.DefaultClient.Do(req)
		if !assert.NoError(t, err, name) {
			return 0, nil, nil
		}
		b, err := io.ReadAll(resp.Body) // an answer cut short counts as far as it came
		resp.Body.Close()
		ev.addResponse("answer to "+name, resp, b)
		if err != nil {
			ev.add("read error of "+name, []byte(err.Error()))
		}
		return resp.StatusCode, resp.Header, b
	}
	lab, thrift, slow, admin := "Bearer "+credLabKey, "Bearer "+credThriftKey, "Bearer "+credSlowKey, "Bearer "+credAdminKey
	completion := func(prompt string, extra string) string {
		return fmt.Sprintf(`{"model":"quill-small","prompt":%q,"temperature":0,"max_tokens":4%s}`, prompt, extra)
	}
	chat := func(model, text, extra string) string {
		return fmt.Sprintf(`{"model":%q,"messages":[{"role":"user","content":%q}],"temperature":0,"max_tokens":4%s}`, model, text, extra)
	}
	echoBody := `{"error":{"message":"key ` + upstreamtest.AuthPlaceholder + ` is not allowed","type":"invalid_request_error","code":"bad_key"}}`

	type call struct {
		name, method, path, auth, body string
		header                         []string
		fault                          *upstreamtest.Fault // queued on the upstream first
		on                             *upstreamtest.Server
		want                           int
		outcome                        string // Cache-Status outcome, when one is wanted
	}
	calls := []call{
		{name: "miss", method: "POST", path: "/v1/completions", auth: lab, body: completion("the pear crates are counted", ""), want: 200, outcome: "miss"},
		{name: "hit", method: "POST", path: "/v1/completions", auth: lab, body: completion("the pear crates are counted", ""), want: 200, outcome: "hit"},
		{name: "streamed miss", method: "POST", path: "/v1/completions", auth: lab, body: completion("the plum crates are counted", `,"stream":true`), want: 200, outcome: "miss"},
		{name: "streamed hit", method: "POST", path: "/v1/completions", auth: lab, body: completion("the plum crates are counted", `,"stream":true`), want: 200, outcome: "hit"},
		{name: "chat miss", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-small", "count the figs", ""), want: 200, outcome: "miss"},
		{name: "chat hit", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-small", "count the figs", ""), want: 200, outcome: "hit"},
		{name: "streamed chat miss", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-small", "count the dates", `,"stream":true,"stream_options":{"include_usage":true}`), want: 200, outcome: "miss"},
		{name: "second upstream miss", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-large", "weigh the figs", ""), want: 200, outcome: "miss"},
		{name: "second upstream streamed", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-large", "weigh the dates", `,"stream":true`), want: 200, outcome: "miss"},
		{name: "batch", method: "POST", path: "/v1/completions", auth: lab, body: `{"model":"quill-small","prompt":["the pear crates are counted","the quince crates are counted"],"temperature":0,"max_tokens":4}`, want: 200},
		{name: "sampled bypass", method: "POST", path: "/v1/completions", auth: lab, body: `{"model":"quill-small","prompt":"a sampled line","temperature":0.9,"max_tokens":4}`, want: 200, outcome: "bypass"},
		{name: "no-store", method: "POST", path: "/v1/completions", auth: lab, body: completion("not to be stored", ""), header: []string{"Cache-Control", "no-store"}, want: 200},
		{name: "no-cache", method: "POST", path: "/v1/completions", auth: lab, body: completion("the pear crates are counted", ""), header: []string{"Cache-Control", "no-cache"}, want: 200},
		{name: "only-if-cached miss", method: "POST", path: "/v1/completions", auth: lab, body: completion("never asked before", ""), header: []string{"Cache-Control", "only-if-cached"}, want: 504},
		{name: "record", method: "POST", path: "/v1/completions", auth: lab, body: completion("a recorded line", ""), header: []string{"Stint-Run", "secret-run"}, want: 200},
		{name: "record sampled stream", method: "POST", path: "/v1/completions", auth: lab, body: `{"model":"quill-small","prompt":"a recorded sample","temperature":0.9,"max_tokens":4,"stream":true}`, header: []string{"Stint-Run", "secret-run"}, want: 200},
		{name: "replay", method: "POST", path: "/v1/completions", auth: lab, body: completion("a recorded line", ""), header: []string{"Stint-Run", "secret-run", "Stint-Run-Mode", "replay"}, want: 200, outcome: "replay"},
		{name: "replay miss", method: "POST", path: "/v1/completions", auth: lab, body: completion("never recorded", ""), header: []string{"Stint-Run", "secret-run", "Stint-Run-Mode", "replay"}, want: 409},
		{name: "model list upstream 401 echoing the key", method: "GET", path: "/v1/models", auth: lab, on: main, fault: &upstreamtest.Fault{Path: upstreamtest.PathModels, Status: 401, EchoAuth: true}, want: 200},
		{name: "model list", method: "GET", path: "/v1/models", auth: lab, want: 200},
		{name: "budget refusal", method: "POST", path: "/v1/completions", auth: thrift, body: completion("thrift asks once", ""), want: 402},
		{name: "rate limit first", method: "POST", path: "/v1/completions", auth: slow, body: completion("slow asks once", ""), want: 200},
		{name: "rate limit refusal", method: "POST", path: "/v1/completions", auth: slow, body: completion("slow asks twice", ""), want: 429},
		{name: "unknown client key", method: "POST", path: "/v1/completions", auth: "Bearer sk-nobody", body: completion("who", ""), want: 401},
		{name: "upstream key as client key", method: "POST", path: "/v1/completions", auth: "Bearer " + credMainKey, body: completion("who", ""), want: 401},
		{name: "no key", method: "POST", path: "/v1/completions", body: completion("who", ""), want: 401},
		{name: "bad JSON", method: "POST", path: "/v1/completions", auth: lab, body: `{"model":`, want: 400},
		{name: "unpriced model", method: "POST", path: "/v1/completions", auth: lab, body: `{"model":"quill-unknown","prompt":"x","temperature":0,"max_tokens":4}`, want: 400},
		{name: "too large", method: "POST", path: "/v1/completions", auth: lab, body: completion(strings.Repeat("big ", 20000), ""), want: 413},
		{name: "unknown path", method: "GET", path: "/v1/nothing", auth: lab, want: 404},
		{name: "upstream 401 echoing the key", method: "POST", path: "/v1/completions", auth: lab, body: completion("echo one", ""), on: main, fault: &upstreamtest.Fault{Status: 401, EchoAuth: true}, want: 401},
		{name: "upstream 400 echoing the key in its body", method: "POST", path: "/v1/completions", auth: lab, body: completion("echo two", ""), on: main, fault: &upstreamtest.Fault{Status: 400, Body: echoBody, EchoAuth: true}, want: 400},
		{name: "upstream 500 echoing the key", method: "POST", path: "/v1/completions", auth: lab, body: completion("echo three", ""), on: main, fault: &upstreamtest.Fault{Status: 500, EchoAuth: true}, want: 500},
		{name: "upstream 429 echoing the key", method: "POST", path: "/v1/completions", auth: lab, body: completion("echo four", ""), on: main, fault: &upstreamtest.Fault{Status: 429, RetryAfter: "1", EchoAuth: true}, want: 429},
		{name: "streamed upstream 401 echoing the key", method: "POST", path: "/v1/completions", auth: lab, body: completion("echo five", `,"stream":true`), on: main, fault: &upstreamtest.Fault{Status: 401, EchoAuth: true}, want: 401},
		{name: "chat upstream 403 echoing the key", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-small", "echo six", ""), on: main, fault: &upstreamtest.Fault{Status: 403, Body: echoBody, EchoAuth: true}, want: 403},
		{name: "upstream connection reset", method: "POST", path: "/v1/completions", auth: lab, body: completion("reset", ""), on: main, fault: &upstreamtest.Fault{Reset: true}, want: 502},
		{name: "upstream hangs past its timeout", method: "POST", path: "/v1/completions", auth: lab, body: completion("hang", ""), on: main, fault: &upstreamtest.Fault{Hang: true}, want: 504},
		{name: "upstream stream cut short", method: "POST", path: "/v1/completions", auth: lab, body: completion("cut", `,"stream":true`), on: main, fault: &upstreamtest.Fault{Cut: 1}, want: 200},
		{name: "second upstream 500 echoing the key", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-large", "echo seven", ""), on: second, fault: &upstreamtest.Fault{Status: 500, Body: echoBody, EchoAuth: true}, want: 500},
		{name: "second upstream 503 echoing the key", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-large", "echo eight", ""), on: second, fault: &upstreamtest.Fault{Status: 503, EchoAuth: true}, want: 503},
		{name: "breaker open", method: "POST", path: "/v1/chat/completions", auth: lab, body: chat("quill-large", "after the trip", ""), want: 503},
		{name: "admin statement", method: "GET", path: "/stint/admin/statement", auth: admin, want: 200},
		{name: "admin budgets", method: "GET", path: "/stint/admin/budgets", auth: admin, want: 200},
		{name: "admin set budget", method: "PUT", path: "/stint/admin/budgets/lab", auth: admin, body: `{"usd": 9.5, "per": "month"}`, want: 200},
		{name: "admin bad budget", method: "PUT", path: "/stint/admin/budgets/lab", auth: admin, body: `{"usd": "lots"}`, want: 400},
		{name: "admin clear budget", method: "DELETE", path: "/stint/admin/budgets/thrift", auth: admin, want: 200},
		{name: "admin with a team key", method: "GET", path: "/stint/admin/statement", auth: lab, want: 401},
		{name: "admin with the upstream key", method: "GET", path: "/stint/admin/statement", auth: "Bearer " + credMainKey, want: 401},
		{name: "runs list", method: "GET", path: "/stint/runs", auth: lab, want: 200},
		{name: "run detail", method: "GET", path: "/stint/runs/secret-run", auth: lab, want: 200},
		{name: "metrics", method: "GET", path: "/metrics", auth: admin, want: 200},
		{name: "metrics without a key", method: "GET", path: "/metrics", want: 401},
		{name: "health", method: "GET", path: "/healthz", want: 200},
		{name: "ready", method: "GET", path: "/readyz", want: 200},
		{name: "operator snapshot", method: "GET", path: "/ui/snapshot.json", auth: admin, want: 200},
		{name: "operator page", method: "GET", path: "/ui", auth: "Basic " + base64.StdEncoding.EncodeToString([]byte("op:"+credAdminKey)), want: 200},
		{name: "operator page without a key", method: "GET", path: "/ui", want: 401},
	}
	for _, tc := range calls {
		if tc.fault != nil {
			tc.on.FailNext(1, *tc.fault)
		}
		status, h, body := do(t, tc.name, tc.method, tc.path, tc.auth, tc.body, tc.header...)
		if tc.fault != nil {
			tc.on.ClearFaults()
		}
		assert.Equal(t, tc.want, status, "%s: %s", tc.name, body)
		if tc.outcome != "" {
			assert.Equal(t, tc.outcome, cacheOutcome(h), "%s: cache outcome", tc.name)
		}
	}

	// Coalesced: two callers wait on a held leader's call.
	main.Block()
	var wg sync.WaitGroup
	for i := range 3 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			status, _, body := do(t, fmt.Sprintf("coalesced %d", i), "POST", "/v1/completions", lab, completion("one call for three", ""))
			assert.Equal(t, 200, status, "coalesced %d: %s", i, body)
		}()
		if i == 0 {
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			require.NoError(t, main.AwaitHeld(ctx, 1))
			cancel()
		}
	}
	awaitMetricLine(t, base, admin, "stint_coalesced_waiting 2")
	main.Release()
	wg.Wait()

	// Export the run, and import it back under another id.
	_, _, archive := do(t, "run export", "GET", "/stint/runs/secret-run/archive", lab, "")
	ev.add("exported archive", archive)
	status, _, body := do(t, "run import", "POST", "/stint/runs/import?as=secret-run-copy", lab, string(archive))
	assert.Equal(t, 200, status, "import: %s", body)
	status, _, body = do(t, "replay of the import", "POST", "/v1/completions", lab, completion("a recorded line", ""), "Stint-Run", "secret-run-copy", "Stint-Run-Mode", "replay")
	assert.Equal(t, 200, status, "replay of the import: %s", body)
	status, _, _ = do(t, "run delete", "DELETE", "/stint/runs/secret-run-copy", lab, "")
	assert.Equal(t, 200, status, "run delete")
	_, _, _ = do(t, "metrics at the end", "GET", "/metrics", admin, "")
	_, _, _ = do(t, "operator snapshot at the end", "GET", "/ui/snapshot.json", admin, "")

	// The upstreams did get their keys: the search below looks for keys
	// that were really in use.
	for _, u := range []struct {
		s   *upstreamtest.Server
		key string
	}{{main, credMainKey}, {second, credSecondKey}} {
		reqs := u.s.Requests()
		require.NotEmpty(t, reqs)
		assert.Equal(t, "Bearer "+u.key, reqs[len(reqs)-1].Header.Get("Authorization"))
	}

	// Request log lines are buffered for a tenth of a second: wait for
	// the last request's line.
	status, _, body = do(t, "last", "POST", "/v1/completions", lab, completion("the last line of the day", ""))
	assert.Equal(t, 200, status, "last: %s", body)
	waitForLog(t, c, "the last line of the day")
	stop(t, c)
	require.NoError(t, c.err, "stint exited with an error:\n%s", c.output())
	ev.add("log", []byte(c.output()))
	files := ev.addDataDir(t, data)
	assert.Positive(t, files, "no files under --data")
	keys := 0
	if rdb != nil {
		keys = ev.addRedis(t, rdb)
		assert.Positive(t, keys, "no keys in Redis")
		assert.Positive(t, ev.decompressed("redis key"), "no compressed Redis value found: the search reads them as stored")
	} else {
		assert.Positive(t, ev.decompressed("bbolt"), "no compressed bbolt value found: the search reads them as stored")
	}
	assert.Positive(t, ev.decompressed("exported archive"), "the archive was not decompressed")
	ev.mu.Lock()
	n := 0
	for _, p := range ev.parts {
		n += len(p.data)
	}
	t.Logf("searched %d bytes in %d parts: %d files under --data, %d Redis keys", n, len(ev.parts), files, keys)
	ev.mu.Unlock()

	// The search reaches what was stored: the prompts (in the run journal
	// and the request log) and a compressed cache entry's text.
	for _, text := range []string{"a recorded line", "the quince crates are counted"} {
		assert.True(t, ev.contains(text), "the evidence lacks %q: the search does not reach everything", text)
	}
	for _, secret := range []string{credMainKey, credSecondKey, credLabKey, credThriftKey, credSlowKey, credAdminKey} {
		assert.Empty(t, ev.find(secret), "secret %.12s... found", secret)
	}
}

// awaitMetricLine polls base's /metrics with auth until it holds line.
func awaitMetricLine(t *testing.T, base, auth, line string) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		req, err := http.NewRequest(http.MethodGet, base+"/metrics", nil)
		require.NoError(t, err)
		req.Header.Set("Authorization", auth)
		if resp, err := http.DefaultClient.Do(req); err == nil {
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if strings.Contains(string(b), "\n"+line+"\n") {
				return
			}
		}
		require.False(t, time.Now().After(deadline), "metrics never showed %q", line)
		time.Sleep(5 * time.Millisecond)
	}
}
