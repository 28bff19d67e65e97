package proxy_test

import (
	"bytes"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltgroup"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
)

// benchProxy is a proxy on a real embedded store in front of a minimal
// upstream answering fixed bytes, so the figures are the proxy's own cost.
func benchProxy(b *testing.B, opts ...rigOption) http.Handler {
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
	o := proxy.Options{
		Store:     cache.NewHot(disk, cache.HotOptions{MaxBytes: 64 << 20}),
		Upstreams: []proxy.Upstream{{Name: "bench", BaseURL: up.URL + "/v1"}},
	}
	for _, fn := range opts {
		fn(&o)
	}
	p, err := proxy.New(o)
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
		if rec := serveOnce(b, h, body); !benchHit(rec.Header()) {
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
		if rec := serveOnce(b, h, body); !benchHit(rec.Header()) {
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

// BenchmarkMissScrubbed is BenchmarkMiss with two upstream credentials to
// mask in every answer (package scrub); compare the two in one run.
func BenchmarkMissScrubbed(b *testing.B) {
	h := benchProxy(b, func(o *proxy.Options) {
		o.Secrets = []string{"bench-upstream-key-0123456789abcdef", "bench-other-key-fedcba9876543210"}
	})
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		i++
		body := fmt.Appendf(nil, `{"model":"bench-model","prompt":"unique prompt %d","temperature":0,"max_tokens":16}`, i)
		serveOnce(b, h, body)
	}
}

// withBenchBudget turns spend control on: a guard on a batched bbolt
// ledger in the store's own file, a budget too large to run out.
func withBenchBudget(b *testing.B) rigOption {
	db, err := bbolt.Open(filepath.Join(b.TempDir(), "ledger.db"), 0o600, &bbolt.Options{NoFreelistSync: true})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = db.Close() })
	ledger, err := boltledger.New(db, boltledger.Options{Update: boltgroup.New(db).Update})
	if err != nil {
		b.Fatal(err)
	}
	limit, _ := budget.FromUSD(1e6)
	g, err := guard.New(guard.Config{
		Prices: budget.PriceTable{Models: map[string]budget.Price{"bench-model": {Input: 0.5, Output: 1.5}}},
		Teams:  map[string]guard.TeamPolicy{"default": {Budget: &budget.Cap{Limit: limit, Period: budget.Total}}},
	}, ledger, ledger, &ratelimit.Local{}, nil)
	if err != nil {
		b.Fatal(err)
	}
	return func(o *proxy.Options) { o.Spend = g }
}

// BenchmarkBudgets compares hits and misses with spend control off and on
// in one run: a hit journals its saving in the background, a miss
// reserves, settles and journals before it answers.
func BenchmarkBudgets(b *testing.B) {
	for _, kind := range []string{"hit", "miss"} {
		for _, on := range []bool{false, true} {
			name := kind + "/budgets=off"
			if on {
				name = kind + "/budgets=on"
			}
			b.Run(name, func(b *testing.B) {
				var h http.Handler
				if on {
					h = benchProxy(b, withBenchBudget(b))
				} else {
					h = benchProxy(b)
				}
				hit := []byte(`{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}`)
				serveOnce(b, h, hit)
				b.ReportAllocs()
				i := 0
				for b.Loop() {
					body := hit
					if kind == "miss" {
						i++
						body = fmt.Appendf(nil, `{"model":"bench-model","prompt":"unique prompt %d","temperature":0,"max_tokens":16}`, i)
					}
					serveOnce(b, h, body)
				}
			})
		}
	}
}

// BenchmarkBudgetsParallel is BenchmarkBudgets' miss case with 16
// concurrent clients per core: shared commits let one sync serve many
// calls.
func BenchmarkBudgetsParallel(b *testing.B) {
	for _, on := range []bool{false, true} {
		b.Run(fmt.Sprintf("miss/budgets=%v", map[bool]string{false: "off", true: "on"}[on]), func(b *testing.B) {
			var h http.Handler
			if on {
				h = benchProxy(b, withBenchBudget(b))
			} else {
				h = benchProxy(b)
			}
			var n atomic.Int64
			b.SetParallelism(16) // 16 × GOMAXPROCS clients
			b.ReportAllocs()
			b.RunParallel(func(pb *testing.PB) {
				for pb.Next() {
					body := fmt.Appendf(nil, `{"model":"bench-model","prompt":"unique prompt %d","temperature":0,"max_tokens":16}`, n.Add(1))
					serveOnce(b, h, body)
				}
			})
		})
	}
}

// BenchmarkRunRecording compares a cache hit with and without a Stint-Run
// header: a recorded call waits for its journal entry to be durable.
func BenchmarkRunRecording(b *testing.B) {
	for _, recorded := range []bool{false, true} {
		b.Run(map[bool]string{false: "hit/plain", true: "hit/recorded"}[recorded], func(b *testing.B) {
			db, err := bbolt.Open(filepath.Join(b.TempDir(), "runs.db"), 0o600, &bbolt.Options{NoFreelistSync: true})
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(func() { _ = db.Close() })
			j, err := runs.NewBolt(db, runs.BoltOptions{Update: boltgroup.New(db).Update})
			if err != nil {
				b.Fatal(err)
			}
			h := benchProxy(b, func(o *proxy.Options) { o.Runs = j })
			body := []byte(`{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}`)
			serveOnce(b, h, body)
			b.ReportAllocs()
			for b.Loop() {
				req := httptest.NewRequest(http.MethodPost, "/v1/completions", bytes.NewReader(body))
				if recorded {
					req.Header.Set(proxy.HeaderRun, "bench-run")
				}
				rec := httptest.NewRecorder()
				h.ServeHTTP(rec, req)
				if rec.Code != http.StatusOK {
					b.Fatalf("status %d: %s", rec.Code, rec.Body)
				}
			}
		})
	}
}

// BenchmarkHitLogged is BenchmarkHit with the JSON request log stint serve
// writes, through slog's JSON handler and through the proxy's own request
// line (Options.RequestLog), so the log line's share of a hit shows.
func BenchmarkHitLogged(b *testing.B) {
	sinks := []struct {
		name string
		opt  rigOption
	}{
		{"slog-json", func(o *proxy.Options) { o.Logger = slog.New(slog.NewJSONHandler(io.Discard, nil)) }},
		{"request-log", func(o *proxy.Options) { o.RequestLog = io.Discard }},
	}
	body := []byte(`{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}`)
	for _, sink := range sinks {
		b.Run(sink.name, func(b *testing.B) {
			h := benchProxy(b, sink.opt)
			serveOnce(b, h, body)
			b.ReportAllocs()
			for b.Loop() {
				if rec := serveOnce(b, h, body); !benchHit(rec.Header()) {
					b.Fatal("not a hit")
				}
			}
		})
	}
}

// BenchmarkMissStoreBeforeAnswer is BenchmarkMiss with the answer released
// before its entry is stored (write behind, "off") and only after it is
// committed and fsynced ("on", Options.StoreBeforeAnswer), for one client
// at a time and for 16 concurrent clients (whose commits are shared). It
// reports each miss's latency at p50 and p99 (µs); compare the two modes
// within one run.
func BenchmarkMissStoreBeforeAnswer(b *testing.B) {
	for _, clients := range []int{1, 16} {
		for _, on := range []bool{false, true} {
			b.Run(fmt.Sprintf("clients=%d/store_before_answer=%v", clients, on), func(b *testing.B) {
				h := benchProxy(b, func(o *proxy.Options) { o.StoreBeforeAnswer = on })
				var (
					next atomic.Int64
					wg   sync.WaitGroup
				)
				lat := make([][]time.Duration, clients)
				per := b.N / clients
				b.ResetTimer()
				for c := range clients {
					wg.Go(func() {
						for range per + min(1, max(0, b.N-per*clients-c)) {
							body := fmt.Appendf(nil, `{"model":"bench-model","prompt":"unique prompt %d","temperature":0,"max_tokens":16}`, next.Add(1))
							start := time.Now()
							req := httptest.NewRequest(http.MethodPost, "/v1/completions", bytes.NewReader(body))
							rec := httptest.NewRecorder()
							h.ServeHTTP(rec, req)
							lat[c] = append(lat[c], time.Since(start))
							if rec.Code != http.StatusOK || !strings.HasPrefix(rec.Header().Get(proxy.HeaderCacheStatus), "stint;fwd=miss;") {
								b.Errorf("status %d %q: %s", rec.Code, proxy.CacheOutcome(rec.Header()), rec.Body)
								return
							}
						}
					})
				}
				wg.Wait()
				b.StopTimer()
				all := slices.Concat(lat...)
				slices.Sort(all)
				if len(all) > 0 {
					b.ReportMetric(float64(all[len(all)/2])/1e3, "p50-µs")
					b.ReportMetric(float64(all[len(all)*99/100])/1e3, "p99-µs")
				}
			})
		}
	}
}

// benchHit reports whether an answer's Cache-Status says hit, cheaply
// (prefix only), so the check costs the benchmark next to nothing.
func benchHit(h http.Header) bool {
	return strings.HasPrefix(h.Get(proxy.HeaderCacheStatus), proxy.CacheName+";hit")
}
