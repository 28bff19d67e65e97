package boltstore_test

import (
	"bytes"
	"fmt"
	"math/rand/v2"
	"path/filepath"
	"testing"

	"github.com/klauspost/compress/s2"
	"github.com/klauspost/compress/zstd"

	"github.com/stintlab/stint/cache/boltstore"
)

// answer is a completion-shaped JSON answer of about n bytes.
func answer(n int) []byte {
	r := rand.New(rand.NewPCG(uint64(n), 3))
	words := []string{"kettle", "copper", "whistles", "two", "tones", "the", "water", "boils", "rating", "7", "clear", "vivid"}
	var b bytes.Buffer
	b.WriteString(`{"id":"chatcmpl-8f3a","object":"chat.completion","created":1767225600,"model":"tern-7","choices":[{"index":0,"message":{"role":"assistant","content":"`)
	for b.Len() < n-90 {
		b.WriteString(words[r.IntN(len(words))])
		b.WriteByte(' ')
	}
	b.WriteString(`"},"finish_reason":"stop"}],"usage":{"prompt_tokens":61,"completion_tokens":40}}`)
	return b.Bytes()
}

func BenchmarkPut(b *testing.B) {
	for _, size := range []int{300, 2000} {
		b.Run(fmt.Sprint("bytes=", size), func(b *testing.B) {
			s := openStore(b, filepath.Join(b.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1})
			v := answer(size)
			ctx := b.Context()
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				if err := s.Put(ctx, k(i), v, 0); err != nil {
					b.Fatal(err)
				}
				i++
			}
		})
	}
}

func BenchmarkGet(b *testing.B) {
	for _, size := range []int{300, 2000} {
		b.Run(fmt.Sprint("bytes=", size), func(b *testing.B) {
			s := openStore(b, filepath.Join(b.TempDir(), "c.db"), boltstore.Options{SweepInterval: -1})
			v := answer(size)
			ctx := b.Context()
			const n = 256
			for i := range n {
				if err := s.Put(ctx, k(i), v, 0); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				if _, found, err := s.Get(ctx, k(i%n)); !found || err != nil {
					b.Fatal("miss")
				}
				i++
			}
		})
	}
}

// BenchmarkCompression measures what zstd (at two levels) and S2 save on
// completion-shaped answers of several sizes, and what they cost; it is how
// DefaultCompressMin and the default codec were chosen.
func BenchmarkCompression(b *testing.B) {
	for _, level := range []zstd.EncoderLevel{zstd.SpeedFastest, zstd.SpeedDefault} {
		enc, _ := zstd.NewWriter(nil, zstd.WithEncoderCRC(false), zstd.WithEncoderLevel(level))
		dec, _ := zstd.NewReader(nil)
		for _, size := range []int{32, 64, 128, 256, 512, 2048, 8192} {
			v := answer(max(size, 512))[:size]
			c := enc.EncodeAll(v, nil)
			name := fmt.Sprintf("%s/bytes=%d", level, size)
			b.Run("encode/"+name, func(b *testing.B) {
				buf := make([]byte, 0, 2*size)
				for b.Loop() {
					buf = enc.EncodeAll(v, buf[:0])
				}
				b.ReportMetric(float64(len(c))/float64(len(v)), "ratio")
			})
			b.Run("decode/"+name, func(b *testing.B) {
				buf := make([]byte, 0, 2*size)
				for b.Loop() {
					buf, _ = dec.DecodeAll(c, buf[:0])
				}
			})
		}
		enc.Close()
		dec.Close()
	}
	for _, size := range []int{32, 64, 128, 256, 512, 2048, 8192} {
		v := answer(max(size, 512))[:size]
		c := s2.Encode(nil, v)
		name := fmt.Sprintf("s2/bytes=%d", size)
		b.Run("encode/"+name, func(b *testing.B) {
			buf := make([]byte, s2.MaxEncodedLen(size))
			for b.Loop() {
				_ = s2.Encode(buf, v)
			}
			b.ReportMetric(float64(len(c))/float64(len(v)), "ratio")
		})
		b.Run("decode/"+name, func(b *testing.B) {
			buf := make([]byte, size)
			for b.Loop() {
				_, _ = s2.Decode(buf, c)
			}
		})
	}
}
