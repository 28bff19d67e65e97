package proxy_test

import (
	"strconv"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy"
)

// BenchmarkHitByStore is BenchmarkHit on each store stint serve can run
// on, in one run so the ratios compare like with like: the embedded store
// with its hot tier, and Redis and a three-master Redis Cluster (started by
// the benchmark, on loopback) with no hot tier, so every hit reads Redis,
// and with the short-lived hot tier stint serve puts in front of them.
func BenchmarkHitByStore(b *testing.B) {
	standalone := redistest.Start(b).Client(b)
	cluster := redistest.StartCluster(b, 3).Client(b)
	prefixes := 0
	onRedis := func(c redis.UniversalClient, hotBytes int64) rigOption {
		return func(o *proxy.Options) {
			prefixes++ // each proxy its own keys
			rs, err := redisstore.New(c, redisstore.Options{Prefix: "bench" + strconv.Itoa(prefixes)})
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(func() { _ = rs.Close() })
			o.Store = cache.NewHot(rs, cache.HotOptions{MaxBytes: hotBytes, MaxAge: 2 * time.Second})
			o.SharedFlights = rs
		}
	}
	stores := []struct {
		name string
		opts []rigOption
	}{
		{"embedded+hot", nil},
		{"redis", []rigOption{onRedis(standalone, -1)}},
		{"cluster", []rigOption{onRedis(cluster, -1)}},
		{"redis+hot", []rigOption{onRedis(standalone, 64<<20)}},
	}
	body := []byte(`{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}`)
	for _, st := range stores {
		h := benchProxy(b, st.opts...)
		serveOnce(b, h, body)
		b.Run(st.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if rec := serveOnce(b, h, body); !benchHit(rec.Header()) {
					b.Fatal("not a hit")
				}
			}
		})
		b.Run(st.name+"/parallel", func(b *testing.B) {
			b.ReportAllocs()
			b.RunParallel(func(pb *testing.PB) {
				for pb.Next() {
					if rec := serveOnce(b, h, body); !benchHit(rec.Header()) {
						b.Error("not a hit")
						return
					}
				}
			})
		})
	}
}
