package cache_test

import (
	"bytes"
	"fmt"
	"sync/atomic"
	"testing"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/internal/redistest"
)

// storeBackends are the stores the Get/Put benchmarks compare in one run:
// the embedded file, a standalone redis-server and a three-master cluster
// (each started by the benchmark), all on loopback.
func storeBackends(b *testing.B) []struct {
	name string
	open func(b *testing.B) cache.Store
} {
	redisOn := func(c redis.UniversalClient) func(b *testing.B) cache.Store {
		return func(b *testing.B) cache.Store {
			s, err := redisstore.New(c, redisstore.Options{Prefix: "bench"})
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(func() { _ = s.Close() })
			return s
		}
	}
	return []struct {
		name string
		open func(b *testing.B) cache.Store
	}{
		{"embedded", func(b *testing.B) cache.Store { return newBolt(b, boltstore.Options{}) }},
		{"redis", redisOn(redistest.Start(b).Client(b))},
		{"cluster", redisOn(redistest.StartCluster(b, 3).Client(b))},
	}
}

// benchAnswer is a completion-shaped value of about 1.5 kB, as the hot-tier
// benchmarks use.
var benchAnswer = bytes.Repeat([]byte(`{"choices":[{"text":"copper kettle"}]}`), 40)

// BenchmarkStoreGet reads one of 64 stored answers per op, on one goroutine
// and from all cores; ns/op of redis and cluster against embedded is the
// ratio of a shared-store hit (past the hot tier) to a local one.
func BenchmarkStoreGet(b *testing.B) {
	for _, be := range storeBackends(b) {
		s := be.open(b)
		keys := make([]string, 64)
		for i := range keys {
			keys[i] = hotKey(i)
			if err := s.Put(b.Context(), keys[i], benchAnswer, 0); err != nil {
				b.Fatal(err)
			}
		}
		b.Run(be.name, func(b *testing.B) {
			ctx := b.Context()
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				if _, found, err := s.Get(ctx, keys[i&63]); !found || err != nil {
					b.Fatalf("Get: found %v, err %v", found, err)
				}
				i++
			}
		})
		b.Run(be.name+"/parallel", func(b *testing.B) {
			ctx := b.Context()
			b.ReportAllocs()
			b.RunParallel(func(pb *testing.PB) {
				i := 0
				for pb.Next() {
					if _, found, err := s.Get(ctx, keys[i&63]); !found || err != nil {
						b.Errorf("Get: found %v, err %v", found, err)
						return
					}
					i++
				}
			})
		})
	}
}

// BenchmarkStorePut writes a fresh key per op. The embedded store fsyncs
// each write (shared by concurrent ones in the parallel case); Redis
// acknowledges from memory.
func BenchmarkStorePut(b *testing.B) {
	for _, be := range storeBackends(b) {
		s := be.open(b)
		b.Run(be.name, func(b *testing.B) {
			ctx := b.Context()
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				if err := s.Put(ctx, fmt.Sprintf("%064x", i), benchAnswer, 0); err != nil {
					b.Fatal(err)
				}
				i++
			}
		})
		b.Run(be.name+"/parallel", func(b *testing.B) {
			ctx := b.Context()
			var n atomic.Int64
			b.ReportAllocs()
			b.RunParallel(func(pb *testing.PB) {
				for pb.Next() {
					if err := s.Put(ctx, fmt.Sprintf("%064x", 1<<40+n.Add(1)), benchAnswer, 0); err != nil {
						b.Error(err)
						return
					}
				}
			})
		})
	}
}
