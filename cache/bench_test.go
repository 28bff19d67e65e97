package cache_test

import (
	"bytes"
	"testing"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/canon"
)

// typicalBody is a chat completions request body of about 330 bytes.
var typicalBody = []byte(`{"model":"tern-7","messages":[{"role":"system","content":"You are a careful grader of short product descriptions."},` +
	`{"role":"user","content":"Rate this description from 1 to 10: 'A copper kettle that whistles in two tones when the water boils.'"}],` +
	`"temperature":0,"max_tokens":64,"top_p":1,"n":1,"logprobs":true,"top_logprobs":5,"seed":7,"stop":["\n\n"]}`)

var keyParts = cache.KeyParts{Namespace: "team-heron", Upstream: "https://llm.example.test/v1", Endpoint: "/v1/chat/completions", Model: "tern-7"}

// BenchmarkKeyDerivation is the per-request key cost: canonicalize the body
// with a reused Canonicalizer (as a pooled one in the proxy), then Key.
func BenchmarkKeyDerivation(b *testing.B) {
	b.ReportAllocs()
	var c canon.Canonicalizer
	buf := make([]byte, 0, 1024)
	for b.Loop() {
		var err error
		buf, err = c.Append(buf[:0], typicalBody)
		if err != nil {
			b.Fatal(err)
		}
		_ = cache.Key(keyParts, buf)
	}
}

// BenchmarkKeyDerivationFresh uses canon.Transform, allocating its scratch.
func BenchmarkKeyDerivationFresh(b *testing.B) {
	b.ReportAllocs()
	for b.Loop() {
		body, err := canon.Transform(typicalBody)
		if err != nil {
			b.Fatal(err)
		}
		_ = cache.Key(keyParts, body)
	}
}

func BenchmarkKey(b *testing.B) {
	body, _ := canon.Transform(typicalBody)
	b.ReportAllocs()
	for b.Loop() {
		_ = cache.Key(keyParts, body)
	}
}

func newHotForBench(b *testing.B, n int) (*cache.Hot, []string) {
	h := cache.NewHot(newBolt(b, boltstore.Options{}), cache.HotOptions{})
	b.Cleanup(func() { _ = h.Close() })
	value := bytes.Repeat([]byte(`{"choices":[{"text":"copper kettle"}]}`), 40) // ~1.5 kB answer
	keys := make([]string, n)
	for i := range keys {
		keys[i] = hotKey(i)
		if err := h.Put(b.Context(), keys[i], value, 0); err != nil {
			b.Fatal(err)
		}
	}
	return h, keys
}

// BenchmarkHotGet is a memory hit.
func BenchmarkHotGet(b *testing.B) {
	h, keys := newHotForBench(b, 64)
	ctx := b.Context()
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		if _, found, err := h.Get(ctx, keys[i&63]); !found || err != nil {
			b.Fatal("miss")
		}
		i++
	}
}

// BenchmarkHotGetParallel is memory hits from all cores.
func BenchmarkHotGetParallel(b *testing.B) {
	h, keys := newHotForBench(b, 64)
	ctx := b.Context()
	b.ReportAllocs()
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		i := 0
		for pb.Next() {
			if _, found, err := h.Get(ctx, keys[i&63]); !found || err != nil {
				b.Error("miss")
				return
			}
			i++
		}
	})
}
