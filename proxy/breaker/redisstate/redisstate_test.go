package redisstate_test

import (
	"context"
	"errors"
	"testing"
	"time"

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
			if err != nil {
				t.Fatal(err)
			}
			if b, err := s.GetData("gobreaker:state:main"); err != nil || b != nil {
				t.Fatalf("no state yet: %q %v, want nil nil", b, err)
			}
			if err := s.SetData("gobreaker:state:main", []byte(`{"state":2}`)); err != nil {
				t.Fatal(err)
			}
			if b, err := s.GetData("gobreaker:state:main"); err != nil || string(b) != `{"state":2}` {
				t.Fatalf("GetData = %q %v", b, err)
			}
			if err := s.Lock("gobreaker:mutex:main"); err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			// Named keys, not KEYS: a cluster client sends KEYS to one node.
			keys := []string{"st:breaker:{main}:state", "st:breaker:{main}:lock"}
			if n, err := c.Exists(ctx, keys...).Result(); err != nil || n != 2 {
				t.Fatalf("EXISTS %v = %d %v, want the state and the lock", keys, n, err)
			}
			a, _ := c.ClusterKeySlot(ctx, keys[0]).Result()
			b, _ := c.ClusterKeySlot(ctx, keys[1]).Result()
			if a != b {
				t.Errorf("%s in slot %d, %s in slot %d: want one slot (hash tag)", keys[0], a, keys[1], b)
			}
			if ttl, _ := c.TTL(ctx, keys[0]).Result(); ttl <= 0 {
				t.Errorf("state TTL %v, want the StateTTL", ttl)
			}
			if err := s.Unlock("gobreaker:mutex:main"); err != nil {
				t.Fatal(err)
			}
			if n, _ := c.Exists(ctx, keys[1]).Result(); n != 0 {
				t.Errorf("lock still there after Unlock")
			}
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
			if err := a.Lock("gobreaker:mutex:x"); err != nil {
				t.Fatal(err)
			}
			if err := b.Lock("gobreaker:mutex:x"); !errors.Is(err, redisstate.ErrLockBusy) {
				t.Fatalf("second holder: %v, want ErrLockBusy", err)
			}
			// b cannot release a's lock.
			_ = b.Unlock("gobreaker:mutex:x")
			if err := b.Lock("gobreaker:mutex:x"); !errors.Is(err, redisstate.ErrLockBusy) {
				t.Fatalf("after b's unlock: %v, want still busy", err)
			}
			if err := a.Unlock("gobreaker:mutex:x"); err != nil {
				t.Fatal(err)
			}
			if err := b.Lock("gobreaker:mutex:x"); err != nil {
				t.Fatalf("after a's unlock: %v", err)
			}
			// A holder that never unlocks loses the lock after LockTTL.
			short := redisstate.Options{LockTTL: 200 * time.Millisecond, LockWait: 50 * time.Millisecond}
			c, _ := redisstate.New(srv.client(t), short)
			d, _ := redisstate.New(srv.client(t), short)
			if err := c.Lock("gobreaker:mutex:y"); err != nil {
				t.Fatal(err)
			}
			deadline := time.Now().Add(10 * time.Second)
			for d.Lock("gobreaker:mutex:y") != nil {
				if time.Now().After(deadline) {
					t.Fatal("the lock never expired")
				}
			}
			if err := d.Unlock("gobreaker:mutex:y"); err != nil {
				t.Fatal(err)
			}
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
			if err == nil {
				t.Fatal("GetData on a stopped Redis: no error")
			}
			// gobreaker reads empty data as "no state" before it looks at err.
			if len(b) == 0 {
				t.Error("GetData returned empty data with its error")
			}
			if err := s.Lock("gobreaker:mutex:x"); err == nil || errors.Is(err, redisstate.ErrLockBusy) {
				t.Errorf("Lock on a stopped Redis: %v, want the connection error", err)
			}
		})
	}
}

func TestPrefixWithBracesIsRefused(t *testing.T) {
	if _, err := redisstate.New(nil, redisstate.Options{Prefix: "a{b}"}); err == nil {
		t.Error("prefix with braces accepted")
	}
}
