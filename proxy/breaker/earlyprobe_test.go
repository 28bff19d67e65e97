package breaker_test

import (
	"sync"
	"testing"
	"time"

	"github.com/sony/gobreaker/v2"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
)

// fakeClock is a settable clock for the early-probe schedule.
type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *fakeClock) now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *fakeClock) set(t time.Time) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = t
}

func (c *fakeClock) add(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
}

// TestEarlyProbeClosesARecoveredUpstream opens a breaker for an hour and
// has traffic arrive: every ProbeEvery one call goes through, one at a
// time; a failed one leaves the breaker open, the first success closes
// it, on every replica sharing its state.
func TestEarlyProbeClosesARecoveredUpstream(t *testing.T) {
	srv := redistest.Start(t)
	backends := []struct {
		name  string
		store func(t *testing.T) gobreaker.SharedDataStore
	}{
		{"local", func(*testing.T) gobreaker.SharedDataStore { return nil }},
		{"shared on redis", func(t *testing.T) gobreaker.SharedDataStore {
			st, err := redisstate.New(srv.Client(t), redisstate.Options{Prefix: t.Name()})
			require.NoError(t, err)
			return st
		}},
	}
	const every = 10 * time.Second
	set := breaker.Settings{ConsecutiveFailures: 1, FailureRatio: -1, OpenFor: time.Hour, ProbeEvery: every}
	for _, be := range backends {
		t.Run(be.name, func(t *testing.T) {
			store := be.store(t)
			b, err := breaker.New("early-up", set, store, breaker.Hooks{})
			require.NoError(t, err)
			clock := &fakeClock{t: time.Now()}
			b.SetClock(clock.now)

			p, err := b.Allow()
			require.NoError(t, err)
			p.Done(breaker.Failure)
			st, _ := b.State()
			require.Equal(t, gobreaker.StateOpen, st)
			clock.set(time.Now()) // gobreaker stamped the opening on the real clock

			clock.add(every / 2)
			_, err = b.Allow()
			assert.ErrorIs(t, err, breaker.ErrOpen, "a call before the first early probe is due")

			clock.add(every / 2)
			probe, err := b.Allow()
			require.NoError(t, err, "no early probe once it is due")
			_, err = b.Allow()
			assert.ErrorIs(t, err, breaker.ErrOpen, "a second call while the early probe is in flight")
			probe.Done(breaker.Failure)
			st, _ = b.State()
			assert.Equal(t, gobreaker.StateOpen, st, "a failed early probe closed the breaker")
			_, err = b.Allow()
			assert.ErrorIs(t, err, breaker.ErrOpen, "a call right after a failed early probe")

			clock.add(every)
			probe, err = b.Allow()
			require.NoError(t, err, "no early probe an interval after the failed one")
			probe.Done(breaker.Success)
			st, _ = b.State()
			assert.Equal(t, gobreaker.StateClosed, st, "a successful early probe left the breaker open")
			p, err = b.Allow()
			require.NoError(t, err)
			p.Done(breaker.Success)

			if store != nil {
				other, err := breaker.New("early-up", set, store, breaker.Hooks{})
				require.NoError(t, err)
				st, _ := other.State()
				assert.Equal(t, gobreaker.StateClosed, st, "another replica still sees it open")
				// The state it closed to trips again as a fresh one.
				p, err := other.Allow()
				require.NoError(t, err)
				p.Done(breaker.Failure)
				st, _ = b.State()
				assert.Equal(t, gobreaker.StateOpen, st, "the closed state does not trip again")
			}
		})
	}
}

func TestNoEarlyProbesWithoutProbeEvery(t *testing.T) {
	b, err := breaker.New("up", breaker.Settings{ConsecutiveFailures: 1, FailureRatio: -1, OpenFor: time.Hour}, nil, breaker.Hooks{})
	require.NoError(t, err)
	clock := &fakeClock{t: time.Now()}
	b.SetClock(clock.now)
	p, err := b.Allow()
	require.NoError(t, err)
	p.Done(breaker.Failure)
	clock.add(59 * time.Minute)
	_, err = b.Allow()
	assert.ErrorIs(t, err, breaker.ErrOpen)
}
