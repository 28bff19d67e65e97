package redistest_test

import (
	"context"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/internal/redistest"
)

// TestClusterSplitsTheSlotsOverEveryMaster checks StartCluster's cluster:
// n masters, no replicas, every node owning a share of the slots and
// agreeing on the map, and keys in different slots landing on different
// nodes.
func TestClusterSplitsTheSlotsOverEveryMaster(t *testing.T) {
	const n = 3
	cl := redistest.StartCluster(t, n)
	require.Len(t, cl.Addrs, n, "%d addresses, want %d", len(cl.Addrs), n)
	ctx := context.Background()
	c := cl.Client(t)
	//lint:ignore SA1019 CLUSTER SLOTS lists a replica only once it is synced, which is what this waits for; CLUSTER SHARDS lists it at once
	slots, err := c.ClusterSlots(ctx).Result()
	require.NoError(t, err)
	owned := map[string]int{}
	for _, s := range slots {
		assert.Lenf(t, s.Nodes, 1, "slots %d-%d: want 1 master and no replica", s.Start, s.End)
		owned[s.Nodes[0].Addr] += s.End - s.Start + 1
	}
	total := 0
	for _, addr := range cl.Addrs {
		// The slots are split evenly: 5461 or 5462 for each of 3.
		got, want := owned[addr], 16384/n
		assert.Falsef(t, got < want || got > want+1, "%s owns %d slots, want %d or %d", addr, got, want, want+1)
		total += owned[addr]
	}
	assert.Equal(t, 16384, total, "%d slots covered, want 16384", total)
	// Every node answers with the same map.
	for _, addr := range cl.Addrs {
		node := (&redistest.Server{Addr: addr}).Client(t)
		info, err := node.ClusterInfo(ctx).Result()
		assert.Falsef(t, err != nil || !strings.Contains(info, "cluster_state:ok") || !strings.Contains(info, "cluster_known_nodes:3"), "%s: %v %q, want ok with 3 known nodes", addr, err, info)
	}
	// {a}, {b} and {c} hash to slots 15495, 3300 and 7365 (CRC16 mod
	// 16384, the cluster spec), one in each third of the slots.
	seen := map[string]bool{}
	for k, slot := range map[string]int64{"k:{a}": 15495, "k:{b}": 3300, "k:{c}": 7365} {
		got, err := c.ClusterKeySlot(ctx, k).Result()
		require.Falsef(t, err != nil || got != slot, "CLUSTER KEYSLOT %s = %d %v, want %d", k, got, err, slot)
		err = c.Set(ctx, k, "1", 0).Err()
		require.NoError(t, err, "SET %s: %v", k, err)
		node, err := c.MasterForKey(ctx, k)
		require.NoError(t, err)
		seen[node.Options().Addr] = true
	}
	assert.Len(t, seen, n, "three keys over the thirds of the slots landed on %d nodes, want %d", len(seen), n)
}

// TestClusterWithReplicasFailsOver checks StartClusterWith's replicas and
// the failover helpers: each slot range has a master and a replica of its
// own, a write to a master reaches its replica, and after the master is
// SIGKILLed (Stop) its replica takes the slots over (AwaitHealthy, MasterOf)
// with the write. Pause stops a server answering until Resume.
func TestClusterWithReplicasFailsOver(t *testing.T) {
	cl := redistest.StartClusterWith(t, redistest.ClusterOptions{Masters: 3, Replicas: 1, NodeTimeout: time.Second})
	require.Len(t, cl.Addrs, 6)
	ctx := context.Background()
	//lint:ignore SA1019 CLUSTER SLOTS lists a replica only once it is synced, which is what this waits for; CLUSTER SHARDS lists it at once
	slots, err := cl.Client(t).ClusterSlots(ctx).Result()
	require.NoError(t, err)
	seen := map[string]bool{}
	for _, s := range slots {
		require.Len(t, s.Nodes, 2, "slots %d-%d: a master and its replica", s.Start, s.End)
		for _, n := range s.Nodes {
			assert.False(t, seen[n.Addr], "%s serves two slot ranges", n.Addr)
			seen[n.Addr] = true
		}
	}
	assert.Len(t, seen, 6)

	const key = "k:{a}"
	master := cl.MasterOf(t, key)
	replicas := cl.ReplicasOf(t, key)
	require.Len(t, replicas, 1)
	mc := master.Client(t)
	require.NoError(t, mc.Set(ctx, key, "kept", 0).Err())
	acked, err := mc.Do(ctx, "WAIT", 1, 5000).Int()
	require.NoError(t, err)
	require.Equal(t, 1, acked, "replicas that confirmed the write")

	replicas[0].Pause(t)
	rc := redis.NewClient(&redis.Options{Addr: replicas[0].Addr, ReadTimeout: 200 * time.Millisecond, MaxRetries: -1})
	defer rc.Close()
	assert.Error(t, rc.Ping(ctx).Err(), "a paused server answered")
	replicas[0].Resume(t)
	assert.NoError(t, rc.Ping(ctx).Err(), "after Resume")

	master.Stop()
	assert.False(t, master.Running())
	cl.AwaitHealthy(t)
	promoted := cl.MasterOf(t, key)
	assert.Equal(t, replicas[0].Addr, promoted.Addr, "the replica took over")
	assert.Empty(t, cl.ReplicasOf(t, key), "a failed master is no replica")
	got, err := promoted.Client(t).Get(ctx, key).Result()
	require.NoError(t, err)
	assert.Equal(t, "kept", got)
}
