package redisrate_test

import (
	"fmt"
	"sync/atomic"
	"testing"

	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/ratelimit/ratelimittest"
	"github.com/stintlab/stint/budget/ratelimit/redisrate"
	"github.com/stintlab/stint/budget/redistest"
)

// TestConformance runs the shared limiter suite, whose WindowBound test
// names GCRA's source and derives its bound, on a real redis-server.
func TestConformance(t *testing.T) {
	c := redistest.Start(t).Client(t)
	var n atomic.Int64
	ratelimittest.Run(t, func(t *testing.T) ratelimit.Limiter {
		return redisrate.New(c, redisrate.Options{Prefix: fmt.Sprintf("rl%d", n.Add(1))})
	})
}

func TestCluster(t *testing.T) {
	c := redistest.StartCluster(t).ClusterClient(t)
	ratelimittest.Run(t, func(t *testing.T) ratelimit.Limiter {
		return redisrate.New(c, redisrate.Options{Prefix: "c" + t.Name()})
	})
}
