package redisstate_test

import (
	"context"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/redis/go-redis/v9"
	"go.uber.org/goleak"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

// backend is a real Redis the store runs on: a client of it, and a way to
// kill it.
type backend struct {
	client func(t *testing.T) redis.UniversalClient
	stop   func()
}

// backends are the deployments the store must work on: a standalone
// redis-server and a real 3-master Redis Cluster, where a breaker's keys
// must share a slot and commands are routed to the node that owns it.
var backends = []struct {
	name  string
	start func(t *testing.T) backend
}{
	{"standalone", func(t *testing.T) backend {
		s := redistest.Start(t)
		return backend{func(t *testing.T) redis.UniversalClient { return s.Client(t) }, s.Stop}
	}},
	{"cluster", func(t *testing.T) backend {
		c := redistest.StartCluster(t, 3)
		return backend{func(t *testing.T) redis.UniversalClient { return c.Client(t) }, c.Stop}
	}},
}

func TestStateRoundTripAndKeysShareASlot(t *testing.T) {
	for _, be := range backends {
		t.Run(be.name, func(t *testing.T) {
			c := be.start(t).client(t)
			s, err := redisstate.New(c, redisstate.Options{Prefix: "st"})
			require.NoError(t, err)
			state, err := s.GetData("gobreaker:state:main")
			require.NoError(t, err, "no state yet")
			require.Nil(t, state, "no state yet: %q, want nil", state)
			require.NoError(t, s.SetData("gobreaker:state:main", []byte(`{"state":2}`)))
			state, err = s.GetData("gobreaker:state:main")
			require.NoError(t, err, "GetData")
			require.Equal(t, `{"state":2}`, string(state), "GetData")
			require.NoError(t, s.Lock("gobreaker:mutex:main"))
			ctx := context.Background()
			// Named keys, not KEYS: a cluster client sends KEYS to one node.
			keys := []string{"st:breaker:{main}:state", "st:breaker:{main}:lock"}
			n, err := c.Exists(ctx, keys...).Result()
			require.NoError(t, err, "EXISTS %v = %d %v, want the state and the lock", keys, n, err)
			require.Equal(t, int64(2), n, "EXISTS %v = %d %v, want the state and the lock", keys, n, err)
			a, _ := c.ClusterKeySlot(ctx, keys[0]).Result()
			b, _ := c.ClusterKeySlot(ctx, keys[1]).Result()
			assert.Equal(t, b, a, "%s in slot %d, %s in slot %d: want one slot (hash tag)", keys[0], a, keys[1], b)
			ttl, _ := c.TTL(ctx, keys[0]).Result()
			assert.Greater(t, ttl, time.Duration(0), "state TTL %v, want the StateTTL", ttl)
			require.NoError(t, s.Unlock("gobreaker:mutex:main"))
			n, _ = c.Exists(ctx, keys[1]).Result()
			assert.Equal(t, int64(0), n, "lock still there after Unlock")
		})
	}
}

func TestLockIsExclusiveAndExpires(t *testing.T) {
	for _, be := range backends {
		t.Run(be.name, func(t *testing.T) {
			srv := be.start(t)
			// A long LockTTL for the exclusive part, so a slow machine cannot
			// let the lock expire in between.
			opts := redisstate.Options{LockTTL: time.Minute, LockWait: 50 * time.Millisecond}
			a, _ := redisstate.New(srv.client(t), opts)
			b, _ := redisstate.New(srv.client(t), opts)
			require.NoError(t, a.Lock("gobreaker:mutex:x"))
			err := b.Lock("gobreaker:mutex:x")
			require.ErrorIs(t, err, redisstate.ErrLockBusy, "second holder: %v, want ErrLockBusy", err)
			// b cannot release a's lock.
			_ = b.Unlock("gobreaker:mutex:x")
			err = b.Lock("gobreaker:mutex:x")
			require.ErrorIs(t, err, redisstate.ErrLockBusy, "after b's unlock: %v, want still busy", err)
			require.NoError(t, a.Unlock("gobreaker:mutex:x"))
			require.NoError(t, b.Lock("gobreaker:mutex:x"), "after a's unlock")
			// A holder that never unlocks loses the lock after LockTTL.
			short := redisstate.Options{LockTTL: 200 * time.Millisecond, LockWait: 50 * time.Millisecond}
			c, _ := redisstate.New(srv.client(t), short)
			d, _ := redisstate.New(srv.client(t), short)
			require.NoError(t, c.Lock("gobreaker:mutex:y"))
			deadline := time.Now().Add(10 * time.Second)
			for d.Lock("gobreaker:mutex:y") != nil {
				require.False(t, time.Now().After(deadline), "the lock never expired")
			}
			require.NoError(t, d.Unlock("gobreaker:mutex:y"))
		})
	}
}

func TestOutageIsAnErrorNotAnEmptyState(t *testing.T) {
	for _, be := range backends {
		t.Run(be.name, func(t *testing.T) {
			srv := be.start(t)
			s, _ := redisstate.New(srv.client(t), redisstate.Options{Timeout: 100 * time.Millisecond})
			srv.stop()
			b, err := s.GetData("gobreaker:state:x")
			require.Error(t, err, "GetData on a stopped Redis: no error")
			// gobreaker reads empty data as "no state" before it looks at err.
			assert.NotEqual(t, 0, len(b), "GetData returned empty data with its error")
			err = s.Lock("gobreaker:mutex:x")
			if assert.Error(t, err, "Lock on a stopped Redis: %v, want the connection error", err) {
				assert.NotErrorIs(t, err, redisstate.ErrLockBusy, "Lock on a stopped Redis: %v, want the connection error", err)
			}
		})
	}
}

func TestPrefixWithBracesIsRefused(t *testing.T) {
	_, err := redisstate.New(nil, redisstate.Options{Prefix: "a{b}"})
	assert.Error(t, err, "prefix with braces accepted")
}
