// Package redisstoretest starts real redis-server processes, standalone
// and as multi-master Redis Clusters, for the tests of packages outside the
// cache tree (the proxy's, the command's) that run the cache on Redis. It
// exposes the cache tree's internal helper; budget/redistest is the budget
// tree's copy of it (the layout lets neither tree import the other), kept
// identical by its TestCopiesAgree.
package redisstoretest

import (
	"testing"

	"github.com/stintlab/stint/cache/internal/redistest"
)

// Server is one running redis-server, with Stop and Restart.
type Server = redistest.Server

// Cluster is a running Redis Cluster, with Stop and Restart of all its
// nodes, and MasterOf, ReplicasOf and AwaitHealthy for failovers.
type Cluster = redistest.Cluster

// ClusterOptions shape a cluster for StartClusterWith: masters, replicas
// per master, cluster-node-timeout.
type ClusterOptions = redistest.ClusterOptions

// Start runs a standalone redis-server on a free loopback port, killed
// when tb's test ends.
func Start(tb testing.TB) *Server {
	tb.Helper()
	return redistest.Start(tb)
}

// StartCluster runs a Redis Cluster of n masters on free loopback ports,
// the slots split evenly, and returns once it is ok.
func StartCluster(tb testing.TB, n int) *Cluster {
	tb.Helper()
	return redistest.StartCluster(tb, n)
}

// StartClusterWith runs a Redis Cluster shaped by o on free loopback
// ports, and returns once it is ok and every replica is synced.
func StartClusterWith(tb testing.TB, o ClusterOptions) *Cluster {
	tb.Helper()
	return redistest.StartClusterWith(tb, o)
}
