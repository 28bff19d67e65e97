// Package redistest starts real redis-server processes for the cache tree's
// tests, each on a free loopback port with persistence off, killed when the
// test ends. It is a small copy of budget's helper: cache must not import
// budget.
package redistest

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"net"
	"os/exec"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// Binary is the redis-server executable the tests run.
const Binary = "/usr/bin/redis-server"

// Server is one running redis-server.
type Server struct {
	Addr string // host:port on 127.0.0.1
}

// Start runs a standalone redis-server and returns once it accepts
// connections. The process is killed when tb's test ends.
func Start(tb testing.TB) *Server {
	tb.Helper()
	return start(tb, false)
}

// Client returns a client of s, closed when tb's test ends.
func (s *Server) Client(tb testing.TB) *redis.Client {
	tb.Helper()
	c := redis.NewClient(&redis.Options{Addr: s.Addr})
	tb.Cleanup(func() { c.Close() })
	return c
}

// Cluster is a running Redis Cluster of masters only (no replicas).
type Cluster struct {
	Addrs []string
}

// StartCluster runs a Redis Cluster of n masters, the 16384 slots split
// evenly between them, and returns once every node reports the cluster ok
// and knows all n nodes. The processes are killed when tb's test ends.
func StartCluster(tb testing.TB, n int) *Cluster {
	tb.Helper()
	ctx := context.Background()
	cl := &Cluster{}
	var nodes []*redis.Client
	for i := range n {
		s := start(tb, true)
		cl.Addrs = append(cl.Addrs, s.Addr)
		c := s.Client(tb)
		nodes = append(nodes, c)
		lo, hi := i*16384/n, (i+1)*16384/n-1
		if err := c.Do(ctx, "CLUSTER", "ADDSLOTSRANGE", lo, hi).Err(); err != nil {
			tb.Fatalf("redistest: CLUSTER ADDSLOTSRANGE %d %d: %v", lo, hi, err)
		}
	}
	for _, addr := range cl.Addrs[1:] {
		host, port, _ := net.SplitHostPort(addr)
		if err := nodes[0].Do(ctx, "CLUSTER", "MEET", host, port).Err(); err != nil {
			tb.Fatalf("redistest: CLUSTER MEET %s: %v", addr, err)
		}
	}
	// Gossip spreads the slot map; wait for it with a bounded poll of the
	// servers (outside processes, not goroutines of ours).
	want := "cluster_known_nodes:" + strconv.Itoa(n)
	deadline := time.Now().Add(20 * time.Second)
	for i := 0; i < len(nodes); {
		info, err := nodes[i].ClusterInfo(ctx).Result()
		if err == nil && strings.Contains(info, "cluster_state:ok") && strings.Contains(info, want) {
			i++
			continue
		}
		if time.Now().After(deadline) {
			tb.Fatalf("redistest: cluster node %s not ready: %v %q", cl.Addrs[i], err, info)
		}
		t := time.NewTimer(20 * time.Millisecond)
		<-t.C
	}
	return cl
}

// Client returns a cluster client of c, closed when tb's test ends.
func (c *Cluster) Client(tb testing.TB) *redis.ClusterClient {
	tb.Helper()
	cc := redis.NewClusterClient(&redis.ClusterOptions{Addrs: c.Addrs})
	tb.Cleanup(func() { cc.Close() })
	return cc
}

func start(tb testing.TB, cluster bool) *Server {
	tb.Helper()
	var lastErr error
	// A free port can be taken by someone else between our probe and
	// redis-server's bind; try a few ports.
	for range 5 {
		s, err := tryStart(tb, cluster)
		if err == nil {
			return s
		}
		lastErr = err
	}
	tb.Fatalf("redistest: cannot start %s: %v", Binary, lastErr)
	return nil
}

func tryStart(tb testing.TB, cluster bool) (*Server, error) {
	port, err := freePort()
	if err != nil {
		return nil, err
	}
	dir := tb.TempDir()
	args := []string{
		"--port", strconv.Itoa(port), "--bind", "127.0.0.1",
		"--save", "", "--appendonly", "no", "--dir", dir,
		"--logfile", "", "--loglevel", "notice",
	}
	if cluster {
		args = append(args, "--cluster-enabled", "yes", "--cluster-config-file", dir+"/nodes.conf")
	}
	cmd := exec.Command(Binary, args...)
	out, err := cmd.StdoutPipe()
	if err != nil {
		return nil, err
	}
	if err := cmd.Start(); err != nil {
		return nil, err
	}
	ready := make(chan error, 1)
	go func() {
		sc := bufio.NewScanner(out)
		var log strings.Builder
		for sc.Scan() {
			line := sc.Text()
			log.WriteString(line + "\n")
			if strings.Contains(line, "Ready to accept connections") {
				ready <- nil
				_, _ = io.Copy(io.Discard, out) // keep the pipe drained
				return
			}
		}
		ready <- fmt.Errorf("redis-server exited before it was ready:\n%s", log.String())
	}()
	select {
	case err = <-ready:
	case <-time.After(20 * time.Second):
		err = fmt.Errorf("redis-server not ready after 20s")
	}
	if err != nil {
		_ = cmd.Process.Kill()
		_ = cmd.Wait()
		return nil, err
	}
	tb.Cleanup(func() {
		_ = cmd.Process.Kill()
		_ = cmd.Wait()
	})
	return &Server{Addr: net.JoinHostPort("127.0.0.1", strconv.Itoa(port))}, nil
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}
