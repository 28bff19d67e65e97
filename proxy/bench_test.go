package proxy_test

import (
	"bytes"
	"fmt"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"testing"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/proxy"
)

// benchProxy is a proxy on a real embedded store in front of a minimal
// upstream answering fixed bytes, so the figures are the proxy's own cost.
func benchProxy(b *testing.B) http.Handler {
	b.Helper()
	answer := []byte(`{"id":"cmpl-bench","object":"text_completion","created":1780000000,"model":"bench-model","choices":[{"text":" the barge drifted past the old mill","index":0,"logprobs":null,"finish_reason":"length"}],"usage":{"prompt_tokens":9,"completion_tokens":8,"total_tokens":17}}`)
	up := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "application/json")
		_, _ = w.Write(answer)
	}))
	b.Cleanup(up.Close)
	disk, err := boltstore.Open(filepath.Join(b.TempDir(), "stint.db"), boltstore.Options{})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = disk.Close() })
	p, err := proxy.New(proxy.Options{
		Store:     cache.NewHot(disk, cache.HotOptions{MaxBytes: 64 << 20}),
		Upstreams: []proxy.Upstream{{Name: "bench", BaseURL: up.URL + "/v1"}},
	})
	if err != nil {
		b.Fatal(err)
	}
	return p
}

func serveOnce(b *testing.B, h http.Handler, body []byte) *httptest.ResponseRecorder {
	req := httptest.NewRequest(http.MethodPost, "/v1/completions", bytes.NewReader(body))
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, req)
	if rec.Code != http.StatusOK {
		b.Fatalf("status %d: %s", rec.Code, rec.Body)
	}
	return rec
}

// BenchmarkHit is a repeated identical request answered from the cache.
func BenchmarkHit(b *testing.B) {
	h := benchProxy(b)
	body := []byte(`{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}`)
	serveOnce(b, h, body)
	b.ReportAllocs()
	for b.Loop() {
		if rec := serveOnce(b, h, body); rec.Header().Get(proxy.HeaderCache) != proxy.OutcomeHit {
			b.Fatal("not a hit")
		}
	}
}

// BenchmarkHitReformatted is a hit whose bytes differ from the stored
// request's, so it is decoded and canonicalized.
func BenchmarkHitReformatted(b *testing.B) {
	h := benchProxy(b)
	serveOnce(b, h, []byte(`{"model":"bench-model","prompt":"The keepers counted the hives","temperature":0,"max_tokens":16}`))
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		i++
		body := fmt.Appendf(nil, `{"max_tokens":16, "temperature":0, "prompt":"The keepers counted the hives", "model":"bench-model" %s}`, bytes.Repeat([]byte(" "), i%64))
		if rec := serveOnce(b, h, body); rec.Header().Get(proxy.HeaderCache) != proxy.OutcomeHit {
			b.Fatal("not a hit")
		}
	}
}

// BenchmarkMiss is a new prompt every time: key, upstream call, store.
func BenchmarkMiss(b *testing.B) {
	h := benchProxy(b)
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		i++
		body := fmt.Appendf(nil, `{"model":"bench-model","prompt":"unique prompt %d","temperature":0,"max_tokens":16}`, i)
		serveOnce(b, h, body)
	}
}
