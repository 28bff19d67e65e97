package redisrate_test

import (
	"context"
	"fmt"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

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

// TestServerClockOutlastsReplicaSkew runs two limiters on one Redis whose
// callers' clocks are an hour apart. On the callers' clocks the one ahead
// finds the other's TAT in its past and admits a second burst; on Redis's
// clock (ServerClock) the burst is shared. The limit is 1 unit a minute,
// so no unit comes back while the test runs.
func TestServerClockOutlastsReplicaSkew(t *testing.T) {
	c := redistest.Start(t).Client(t)
	lim := ratelimit.Limit{Rate: 1, Per: time.Minute, Burst: 3}
	now := time.Now()
	tests := []struct {
		name        string
		serverClock bool
		want        int
	}{
		{"caller clocks", false, 2 * 3},
		{"server clock", true, 3},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			opts := redisrate.Options{Prefix: "skew" + fmt.Sprint(tt.serverClock), ServerClock: tt.serverClock}
			replicas := []struct {
				l   *redisrate.Limiter
				now time.Time
			}{{redisrate.New(c, opts), now}, {redisrate.New(c, opts), now.Add(time.Hour)}}
			admitted := 0
			for _, r := range replicas {
				for range 5 {
					_, err := r.l.Reserve(context.Background(), r.now, "lab:rpm", lim, 1, 0)
					if err == nil {
						admitted++
						continue
					}
					var le *ratelimit.LimitedError
					require.ErrorAs(t, err, &le)
				}
			}
			assert.Equal(t, tt.want, admitted, "units admitted over both replicas")
		})
	}
}
