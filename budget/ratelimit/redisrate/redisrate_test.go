package redisrate_test

import (
	"fmt"
	"sync/atomic"
	"testing"

	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/ratelimit/ratelimittest"
	"github.com/stintlab/stint/budget/ratelimit/redisrate"
	"github.com/stintlab/stint/internal/redistest"
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

// TestCluster runs the same suite on a real 3-master Redis Cluster, so
// limiters' keys are spread over nodes and each script's keys must share
// a slot.
func TestCluster(t *testing.T) {
	c := redistest.StartCluster(t, 3).Client(t)
	ratelimittest.Run(t, func(t *testing.T) ratelimit.Limiter {
		return redisrate.New(c, redisrate.Options{Prefix: "c" + t.Name()})
	})
}
