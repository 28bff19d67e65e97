package redisstore_test

import (
	"sync"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/internal/redistest"
)

// fakeClock is a settable clock for the store's cooldown.
type fakeClock struct {
	mu sync.Mutex // guards t
	t  time.Time
}

func (c *fakeClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *fakeClock) Add(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
}

// TestCooldownIsPerNode stops one primary of a real three-master cluster
// under a store with a long cooldown (by the store's own clock, which the
// test moves): the keys of the other primaries are served all along, only
// the dead primary's keys fail fast; and once the node answers again, the
// next probe (a tenth of the cooldown later) ends its cooldown, instead of
// the whole cooldown holding recovery off.
func TestCooldownIsPerNode(t *testing.T) {
	cl := redistest.StartCluster(t, 3)
	c := redis.NewClusterClient(&redis.ClusterOptions{Addrs: cl.Addrs, DialerRetries: 1, ContextTimeoutEnabled: true})
	defer c.Close()
	const prefix, cooldown = "cool", 10 * time.Second
	clk := &fakeClock{t: time.Date(2026, 12, 1, 9, 0, 0, 0, time.UTC)}
	s := newStore(t, c, redisstore.Options{Prefix: prefix, Timeout: 300 * time.Millisecond, Cooldown: cooldown, Now: clk.Now})
	ctx := t.Context()
	// Two keys whose slots have different primaries.
	primaryOf := func(k string) string {
		n, err := c.MasterForKey(ctx, prefix+":cache:{"+k+"}:v")
		require.NoError(t, err)
		return n.Options().Addr
	}
	dead, live := key(1), ""
	for i := 2; live == ""; i++ {
		if primaryOf(key(i)) != primaryOf(dead) {
			live = key(i)
		}
	}
	for _, k := range []string{dead, live} {
		require.NoError(t, s.Put(ctx, k, []byte("kept"), 0))
	}
	node := cl.MasterOf(t, prefix+":cache:{"+dead+"}:v")
	node.Stop()

	_, _, err := s.Get(ctx, dead)
	require.ErrorIs(t, err, redisstore.ErrUnavailable, "the dead primary's key")
	v, found, err := s.Get(ctx, live)
	require.NoError(t, err, "another primary's key while the dead one cools down")
	assert.True(t, found)
	assert.Equal(t, "kept", string(v))
	_, _, err = s.Get(ctx, dead)
	assert.ErrorIs(t, err, redisstore.ErrUnavailable)
	assert.ErrorContains(t, err, "cooling down", "a second call for the dead primary fails fast")

	cl.Restart(t) // the node comes back, empty (no persistence)
	_, _, err = s.Get(ctx, dead)
	assert.ErrorContains(t, err, "cooling down", "before the next probe is due")
	clk.Add(cooldown / 10)
	_, found, err = s.Get(ctx, dead)
	require.NoError(t, err, "the probe a tenth of the cooldown later")
	assert.False(t, found, "the restarted node is empty")
	require.NoError(t, s.Put(ctx, dead, []byte("back"), 0), "after the probe ended the cooldown")
	v, _, err = s.Get(ctx, dead)
	require.NoError(t, err)
	assert.Equal(t, "back", string(v))
}
