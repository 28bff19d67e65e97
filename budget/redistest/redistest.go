// Package redistest starts real redis-server processes for tests, each on a
// free loopback port with persistence off, killed when the test ends:
// standalone servers, and multi-master Redis Clusters joined with
// `redis-cli --cluster create`.
//
// It is exported (not internal) so that the proxy's and the command's
// tests can run their replicas on a real Redis too. The cache tree keeps a
// copy, cache/internal/redistest, because cache must not import budget;
// the two differ only in this comment (TestCopiesAgree checks it).
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

// CLI is the redis-cli executable that joins cluster nodes (installed with
// redis-server).
const CLI = "/usr/bin/redis-cli"

// MinClusterSize is the fewest masters `redis-cli --cluster create`
// accepts.
const MinClusterSize = 3

// Server is one running redis-server.
type Server struct {
	Addr string // host:port on 127.0.0.1
	args []string
	cmd  *exec.Cmd // nil while stopped
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

// Stop kills the server (SIGKILL, as a crash or a network cut looks to
// clients). Restart brings it back on the same address.
func (s *Server) Stop() { s.kill() }

// Restart starts a stopped server again on the same address. Persistence
// is off, so a standalone server comes back empty; a cluster node comes
// back with its node id and slots (its nodes.conf) but no data.
func (s *Server) Restart(tb testing.TB) {
	tb.Helper()
	if s.cmd != nil {
		tb.Fatal("redistest: Restart of a running server")
	}
	if err := s.launch(); err != nil {
		tb.Fatalf("redistest: restart on %s: %v", s.Addr, err)
	}
}

// Cluster is a running Redis Cluster of masters only (no replicas).
type Cluster struct {
	Addrs []string
	nodes []*Server
}

// StartCluster runs n redis-servers with --cluster-enabled yes and joins
// them with `redis-cli --cluster create ... --cluster-replicas 0`, which
// splits the 16384 slots evenly between the n masters. It returns once
// every node reports the cluster ok and knows all n nodes. n must be at
// least MinClusterSize. The processes are killed when tb's test ends.
func StartCluster(tb testing.TB, n int) *Cluster {
	tb.Helper()
	if n < MinClusterSize {
		tb.Fatalf("redistest: a cluster of %d masters; redis-cli --cluster create needs at least %d", n, MinClusterSize)
	}
	cl := &Cluster{}
	var nodes []*redis.Client
	for range n {
		s := start(tb, true)
		cl.Addrs = append(cl.Addrs, s.Addr)
		cl.nodes = append(cl.nodes, s)
		nodes = append(nodes, s.Client(tb))
	}
	if err := cl.create(); err != nil {
		tb.Fatalf("redistest: %v", err)
	}
	cl.awaitOK(tb, nodes)
	return cl
}

// create joins the nodes with redis-cli, bounded by a timeout so a stuck
// join fails the test instead of hanging it.
func (c *Cluster) create() error {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	args := append([]string{"--cluster", "create"}, c.Addrs...)
	args = append(args, "--cluster-replicas", "0", "--cluster-yes")
	out, err := exec.CommandContext(ctx, CLI, args...).CombinedOutput()
	// redis-cli prints this once every slot has a master; its exit status
	// alone does not tell a partial join from a whole one.
	const covered = "All 16384 slots covered"
	if err != nil || !strings.Contains(string(out), covered) {
		return fmt.Errorf("%s %s: %v (want %q in its output):\n%s", CLI, strings.Join(args, " "), err, covered, out)
	}
	return nil
}

// awaitOK waits until every node reports cluster_state:ok and knows all
// the nodes. Gossip spreads the slot map; this is a bounded poll of the
// servers (outside processes, not goroutines of ours).
func (c *Cluster) awaitOK(tb testing.TB, nodes []*redis.Client) {
	tb.Helper()
	ctx := context.Background()
	want := "cluster_known_nodes:" + strconv.Itoa(len(nodes))
	deadline := time.Now().Add(30 * time.Second)
	for i := 0; i < len(nodes); {
		info, err := nodes[i].ClusterInfo(ctx).Result()
		if err == nil && strings.Contains(info, "cluster_state:ok") && strings.Contains(info, want) {
			i++
			continue
		}
		if time.Now().After(deadline) {
			tb.Fatalf("redistest: cluster node %s not ready: %v %q", c.Addrs[i], err, info)
		}
		t := time.NewTimer(20 * time.Millisecond)
		<-t.C
	}
}

// Client returns a cluster client of c, closed when tb's test ends.
func (c *Cluster) Client(tb testing.TB) *redis.ClusterClient {
	tb.Helper()
	cc := redis.NewClusterClient(&redis.ClusterOptions{Addrs: c.Addrs})
	tb.Cleanup(func() { cc.Close() })
	return cc
}

// Stop kills every node of the cluster (SIGKILL).
func (c *Cluster) Stop() {
	for _, s := range c.nodes {
		s.kill()
	}
}

// Restart starts every stopped node again on its address with its cluster
// config, and returns once the cluster is ok again. The nodes come back
// empty.
func (c *Cluster) Restart(tb testing.TB) {
	tb.Helper()
	var nodes []*redis.Client
	for _, s := range c.nodes {
		if s.cmd == nil {
			s.Restart(tb)
		}
		cl := redis.NewClient(&redis.Options{Addr: s.Addr})
		defer cl.Close()
		nodes = append(nodes, cl)
	}
	c.awaitOK(tb, nodes)
}

func start(tb testing.TB, cluster bool) *Server {
	tb.Helper()
	var lastErr error
	// A free port can be taken by someone else between our probe and
	// redis-server's bind (or, for a cluster node, its bus port 10000
	// above); try a few ports.
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
	port, err := freePort(cluster)
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
	s := &Server{Addr: net.JoinHostPort("127.0.0.1", strconv.Itoa(port)), args: args}
	if err := s.launch(); err != nil {
		return nil, err
	}
	tb.Cleanup(s.kill)
	return s, nil
}

// launch runs redis-server with s.args and waits until it is ready.
func (s *Server) launch() error {
	cmd := exec.Command(Binary, s.args...)
	out, err := cmd.StdoutPipe()
	if err != nil {
		return err
	}
	if err := cmd.Start(); err != nil {
		return err
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
		return err
	}
	s.cmd = cmd
	return nil
}

func (s *Server) kill() {
	if s.cmd == nil {
		return
	}
	_ = s.cmd.Process.Kill()
	_ = s.cmd.Wait()
	s.cmd = nil
}

// busOffset is how far above its port a cluster node listens for its
// cluster bus (Redis's default cluster-port).
const busOffset = 10000

// freePort returns a loopback port free at the time of asking; for a
// cluster node, one whose bus port is a valid port and free too.
func freePort(cluster bool) (int, error) {
	for range 20 {
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			return 0, err
		}
		port := l.Addr().(*net.TCPAddr).Port
		if !cluster {
			l.Close()
			return port, nil
		}
		if port+busOffset > 65535 {
			l.Close()
			continue
		}
		bus, err := net.Listen("tcp", net.JoinHostPort("127.0.0.1", strconv.Itoa(port+busOffset)))
		l.Close()
		if err != nil {
			continue
		}
		bus.Close()
		return port, nil
	}
	return 0, fmt.Errorf("no free port with a free cluster bus port %d above it", busOffset)
}
