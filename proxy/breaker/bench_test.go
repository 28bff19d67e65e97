package breaker_test

import (
	"testing"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
)

// BenchmarkAllowDone is the breaker's cost per upstream call: local, and
// shared on a real Redis (one GET to allow, a locked read-update-write to
// record).
func BenchmarkAllowDone(b *testing.B) {
	b.Run("local", func(b *testing.B) {
		br, err := breaker.New("bench", breaker.Settings{}, nil, breaker.Hooks{})
		if err != nil {
			b.Fatal(err)
		}
		for b.Loop() {
			p, err := br.Allow()
			if err != nil {
				b.Fatal(err)
			}
			p.Done(breaker.Success)
		}
	})
	b.Run("redis", func(b *testing.B) {
		srv := redistest.Start(b)
		st, err := redisstate.New(srv.Client(b), redisstate.Options{})
		if err != nil {
			b.Fatal(err)
		}
		br, err := breaker.New("bench", breaker.Settings{}, st, breaker.Hooks{OnStoreError: func(err error) { b.Fatal(err) }})
		if err != nil {
			b.Fatal(err)
		}
		for b.Loop() {
			p, err := br.Allow()
			if err != nil {
				b.Fatal(err)
			}
			p.Done(breaker.Success)
		}
	})
}
