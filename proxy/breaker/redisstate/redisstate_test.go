package redisstate_test

import (
	"context"
	"errors"
	"testing"
	"time"

	"go.uber.org/goleak"

	"github.com/stintlab/stint/budget/redistest"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

func TestStateRoundTripAndKeysShareASlot(t *testing.T) {
	srv := redistest.StartCluster(t)
	c := srv.ClusterClient(t)
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
	keys, err := c.Keys(ctx, "st:breaker:*").Result()
	if err != nil || len(keys) != 2 {
		t.Fatalf("keys %v %v, want the state and the lock", keys, err)
	}
	a, _ := c.ClusterKeySlot(ctx, keys[0]).Result()
	b, _ := c.ClusterKeySlot(ctx, keys[1]).Result()
	if a != b {
		t.Errorf("%s in slot %d, %s in slot %d: want one slot (hash tag)", keys[0], a, keys[1], b)
	}
	if ttl, _ := c.TTL(ctx, "st:breaker:{main}:state").Result(); ttl <= 0 {
		t.Errorf("state TTL %v, want the StateTTL", ttl)
	}
	if err := s.Unlock("gobreaker:mutex:main"); err != nil {
		t.Fatal(err)
	}
}

func TestLockIsExclusiveAndExpires(t *testing.T) {
	srv := redistest.Start(t)
	// A long LockTTL for the exclusive part, so a slow machine cannot let
	// the lock expire in between.
	opts := redisstate.Options{LockTTL: time.Minute, LockWait: 50 * time.Millisecond}
	a, _ := redisstate.New(srv.Client(t), opts)
	b, _ := redisstate.New(srv.Client(t), opts)
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
	c, _ := redisstate.New(srv.Client(t), short)
	d, _ := redisstate.New(srv.Client(t), short)
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
}

func TestOutageIsAnErrorNotAnEmptyState(t *testing.T) {
	srv := redistest.Start(t)
	s, _ := redisstate.New(srv.Client(t), redisstate.Options{Timeout: 100 * time.Millisecond})
	srv.Stop()
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
}

func TestPrefixWithBracesIsRefused(t *testing.T) {
	if _, err := redisstate.New(nil, redisstate.Options{Prefix: "a{b}"}); err == nil {
		t.Error("prefix with braces accepted")
	}
}
