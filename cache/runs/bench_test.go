package runs_test

import (
	"context"
	"fmt"
	"sync/atomic"
	"testing"

	"github.com/stintlab/stint/cache/runs"
)

// BenchmarkRecord measures Record of a 1 KB answer into one run, from one
// goroutine (each Record waits for its own commit) and from many (the
// group committer shares commits; Redis pipelines nothing, so it measures
// round trips in parallel).
func BenchmarkRecord(b *testing.B) {
	body := []byte(fmt.Sprintf(`{"choices":[{"text":%q}]}`, make([]byte, 1000)))
	for _, mk := range []func(testing.TB) backend{func(testing.TB) backend { return boltBackend() }, redisBackend} {
		be := mk(b)
		b.Run(be.name+"/serial", func(b *testing.B) {
			j := be.open(b)
			i := 0
			for b.Loop() {
				record(b, j, i, body)
				i++
			}
		})
		b.Run(be.name+"/parallel", func(b *testing.B) {
			j := be.open(b)
			var n atomic.Int64
			b.SetParallelism(8)
			b.RunParallel(func(pb *testing.PB) {
				for pb.Next() {
					record(b, j, int(n.Add(1)), body)
				}
			})
		})
	}
}

func record(b *testing.B, j runs.Journal, i int, body []byte) {
	// Distinct bodies, so each Record stores one; keys repeat.
	body = append(body[:len(body):len(body)], byte(i), byte(i>>8), byte(i>>16))
	_, err := j.Record(context.Background(), "lab", "bench", runs.Entry{Key: keyOf(fmt.Sprint(i % 100)), Time: base},
		runs.Answer{Status: 200, ContentType: "application/json", Body: body})
	if err != nil {
		b.Fatal(err)
	}
}
