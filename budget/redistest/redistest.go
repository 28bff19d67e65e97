// Package redistest starts real redis-server processes for tests, each on a
// free loopback port with persistence off, stopped when the test ends.
//
// It is exported (not internal) so that the proxy's and the command's
// tests can run their replicas on a real Redis too. The cache tree keeps its
// own small copy because cache must not import budget.
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
	args []string
	cmd  *exec.Cmd // nil while stopped
}

// Start runs a standalone redis-server and returns once it accepts
// connections. The process is killed when tb's test ends.
func Start(tb testing.TB) *Server {
	tb.Helper()
	return start(tb, false)
}

// StartCluster runs a redis-server in cluster mode as a one-node cluster
// owning all 16384 slots, so that Redis enforces the cluster's rules
// (CROSSSLOT errors for scripts whose keys span slots). Use it with
// redis.NewClusterClient.
func StartCluster(tb testing.TB) *Server {
	tb.Helper()
	s := start(tb, true)
	ctx := context.Background()
	c := redis.NewClient(&redis.Options{Addr: s.Addr})
	defer c.Close()
	if err := c.Do(ctx, "CLUSTER", "ADDSLOTSRANGE", 0, 16383).Err(); err != nil {
		tb.Fatalf("redistest: CLUSTER ADDSLOTSRANGE: %v", err)
	}
	// The node reports cluster_state:ok once it has taken the slots; wait
	// for that with a bounded poll of the server (an outside process, not
	// a goroutine of ours).
	deadline := time.Now().Add(10 * time.Second)
	for {
		info, err := c.ClusterInfo(ctx).Result()
		if err == nil && strings.Contains(info, "cluster_state:ok") {
			return s
		}
		if time.Now().After(deadline) {
			tb.Fatalf("redistest: cluster did not become ok: %v %q", err, info)
		}
		t := time.NewTimer(20 * time.Millisecond)
		<-t.C
	}
}

// Client returns a client of s, closed when tb's test ends.
func (s *Server) Client(tb testing.TB) *redis.Client {
	tb.Helper()
	c := redis.NewClient(&redis.Options{Addr: s.Addr})
	tb.Cleanup(func() { c.Close() })
	return c
}

// ClusterClient returns a cluster client of a server started with
// StartCluster, closed when tb's test ends.
func (s *Server) ClusterClient(tb testing.TB) *redis.ClusterClient {
	tb.Helper()
	c := redis.NewClusterClient(&redis.ClusterOptions{Addrs: []string{s.Addr}})
	tb.Cleanup(func() { c.Close() })
	return c
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

// Stop kills the server (SIGKILL, as a crash or a network cut looks to
// clients); Restart brings it back on the same address, empty.
func (s *Server) Stop() { s.kill() }

// Restart starts a stopped server again on the same address. Persistence
// is off, so it comes back empty.
func (s *Server) Restart(tb testing.TB) {
	tb.Helper()
	if s.cmd != nil {
		tb.Fatal("redistest: Restart of a running server")
	}
	if err := s.launch(); err != nil {
		tb.Fatalf("redistest: restart on %s: %v", s.Addr, err)
	}
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}
