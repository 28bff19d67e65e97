// Package redistest starts real redis-server processes for tests, each on a
// free loopback port with persistence off, killed when the test ends:
// standalone servers, and multi-master Redis Clusters joined with
// `redis-cli --cluster create`, with or without replicas (so a test can
// SIGKILL a primary and watch its replica take over).
//
// It sits at the module's root, outside the cache, budget and proxy trees,
// and imports nothing of stint, so every package's tests can use it.
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
	"syscall"
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
	return start(tb, nil)
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

// Pause stops the server's process (SIGSTOP) without killing it: its
// sockets stay open and the kernel still takes in what clients send, but
// it answers nothing, as a hung or overloaded server does. Resume
// continues it; a paused server is still killed when the test ends.
func (s *Server) Pause(tb testing.TB) {
	tb.Helper()
	if s.cmd == nil {
		tb.Fatal("redistest: Pause of a stopped server")
	}
	if err := s.cmd.Process.Signal(syscall.SIGSTOP); err != nil {
		tb.Fatalf("redistest: pause %s: %v", s.Addr, err)
	}
}

// Resume continues a paused server (SIGCONT).
func (s *Server) Resume(tb testing.TB) {
	tb.Helper()
	if s.cmd == nil {
		tb.Fatal("redistest: Resume of a stopped server")
	}
	if err := s.cmd.Process.Signal(syscall.SIGCONT); err != nil {
		tb.Fatalf("redistest: resume %s: %v", s.Addr, err)
	}
}

// Running reports whether the server has a process: started and not
// stopped (a paused one counts).
func (s *Server) Running() bool { return s.cmd != nil }

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

// Cluster is a running Redis Cluster.
type Cluster struct {
	// Addrs are every node's address, masters and replicas, in the order
	// they were started (the seeds a client needs).
	Addrs    []string
	nodes    []*Server
	replicas int // replicas per master
}

// ClusterOptions shape a cluster for StartClusterWith.
type ClusterOptions struct {
	// Masters is the number of masters, at least MinClusterSize.
	Masters int
	// Replicas is the number of replicas of each master; 0 means none.
	Replicas int
	// NodeTimeout is the nodes' cluster-node-timeout: how long a node may
	// be unreachable before the others count it as failed and, when it
	// is a master with a replica, fail it over. 0 means Redis's default
	// (15 s). Whole milliseconds.
	NodeTimeout time.Duration
}

// StartCluster runs n redis-servers with --cluster-enabled yes and joins
// them with `redis-cli --cluster create ... --cluster-replicas 0`, which
// splits the 16384 slots evenly between the n masters. It returns once
// every node reports the cluster ok and knows all n nodes. n must be at
// least MinClusterSize. The processes are killed when tb's test ends.
func StartCluster(tb testing.TB, n int) *Cluster {
	tb.Helper()
	return StartClusterWith(tb, ClusterOptions{Masters: n})
}

// StartClusterWith runs o.Masters × (1 + o.Replicas) redis-servers with
// --cluster-enabled yes and joins them with `redis-cli --cluster create
// ... --cluster-replicas o.Replicas`, which makes the first o.Masters
// nodes masters with the slots split evenly and gives each o.Replicas of
// the others as replicas. It returns once every node reports the cluster
// ok and knows every node, and every replica has finished its first sync
// and is listed for its master's slots (CLUSTER SLOTS), so a client sees
// the replicas from its first slot map. A replica takes over when its
// master has been unreachable for NodeTimeout (replica validity checks
// off, so it always may). The processes are killed when tb's test ends.
func StartClusterWith(tb testing.TB, o ClusterOptions) *Cluster {
	tb.Helper()
	if o.Masters < MinClusterSize {
		tb.Fatalf("redistest: a cluster of %d masters; redis-cli --cluster create needs at least %d", o.Masters, MinClusterSize)
	}
	if o.Replicas < 0 || o.NodeTimeout < 0 {
		tb.Fatalf("redistest: %d replicas per master and node timeout %v must not be negative", o.Replicas, o.NodeTimeout)
	}
	extra := []string{
		// A replica's first sync starts at once (Redis waits 5 s by
		// default for more replicas to share it); the master pings its
		// replicas every second (default 10 s), which moves the
		// replication offset on: CLUSTER SLOTS lists a replica only once
		// its offset is not 0. And a replica fails over however long it
		// has been apart from its master.
		"--repl-diskless-sync-delay", "0",
		"--repl-ping-replica-period", "1",
		"--cluster-replica-validity-factor", "0",
	}
	if o.NodeTimeout > 0 {
		extra = append(extra, "--cluster-node-timeout", strconv.FormatInt(o.NodeTimeout.Milliseconds(), 10))
	}
	cl := &Cluster{replicas: o.Replicas}
	for range o.Masters * (1 + o.Replicas) {
		s := start(tb, extra)
		cl.Addrs = append(cl.Addrs, s.Addr)
		cl.nodes = append(cl.nodes, s)
	}
	if err := cl.create(); err != nil {
		tb.Fatalf("redistest: %v", err)
	}
	cl.awaitOK(tb)
	return cl
}

// create joins the nodes with redis-cli, bounded by a timeout so a stuck
// join fails the test instead of hanging it.
func (c *Cluster) create() error {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	args := append([]string{"--cluster", "create"}, c.Addrs...)
	args = append(args, "--cluster-replicas", strconv.Itoa(c.replicas), "--cluster-yes")
	out, err := exec.CommandContext(ctx, CLI, args...).CombinedOutput()
	// redis-cli prints this once every slot has a master; its exit status
	// alone does not tell a partial join from a whole one.
	const covered = "All 16384 slots covered"
	if err != nil || !strings.Contains(string(out), covered) {
		return fmt.Errorf("%s %s: %v (want %q in its output):\n%s", CLI, strings.Join(args, " "), err, covered, out)
	}
	return nil
}

// awaitOK waits until every running node reports cluster_state:ok and
// knows all the nodes, and every slot range has a running master and (in a
// cluster with replicas) as many available replicas in every running
// node's CLUSTER SLOTS as the cluster has running replicas for it. Gossip
// spreads the slot map; this is a bounded poll of the servers (outside
// processes, not goroutines of ours).
func (c *Cluster) awaitOK(tb testing.TB) {
	tb.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		err := c.healthy(tb)
		if err == nil {
			return
		}
		if time.Now().After(deadline) {
			tb.Fatalf("redistest: cluster not ready: %v", err)
		}
		t := time.NewTimer(20 * time.Millisecond)
		<-t.C
	}
}

// healthy checks the conditions awaitOK waits for, once.
func (c *Cluster) healthy(tb testing.TB) error {
	tb.Helper()
	ctx := context.Background()
	want := "cluster_known_nodes:" + strconv.Itoa(len(c.nodes))
	// Each running node's own view of its role: a replica with a live
	// link to its master counts as serving that master's slots.
	running := map[string]bool{}
	serving := map[string]int{} // master address -> running nodes serving its slots
	for _, s := range c.nodes {
		if s.cmd == nil {
			continue
		}
		running[s.Addr] = true
		master, err := s.masterOf(ctx)
		if err != nil {
			return err
		}
		if master != "" {
			serving[master]++
		}
	}
	for _, s := range c.nodes {
		if s.cmd == nil {
			continue
		}
		cl := redis.NewClient(&redis.Options{Addr: s.Addr, MaxRetries: -1})
		info, err := cl.ClusterInfo(ctx).Result()
		if err != nil || !strings.Contains(info, "cluster_state:ok") || !strings.Contains(info, want) {
			cl.Close()
			return fmt.Errorf("node %s: %v %q", s.Addr, err, info)
		}
		//lint:ignore SA1019 CLUSTER SLOTS lists a replica only once it is synced, which is what this waits for; CLUSTER SHARDS lists it at once
		slots, err := cl.ClusterSlots(ctx).Result()
		cl.Close()
		if err != nil {
			return fmt.Errorf("node %s: CLUSTER SLOTS: %w", s.Addr, err)
		}
		for _, r := range slots {
			if len(r.Nodes) == 0 || !running[r.Nodes[0].Addr] {
				return fmt.Errorf("node %s: slots %d-%d have no running master: %v", s.Addr, r.Start, r.End, r.Nodes)
			}
			if got, want := len(r.Nodes), serving[r.Nodes[0].Addr]; got != want {
				return fmt.Errorf("node %s: slots %d-%d list %d nodes, want the master and its %d synced replicas", s.Addr, r.Start, r.End, got, want-1)
			}
		}
	}
	return nil
}

// masterOf returns, by the server's INFO replication, the address of the
// master whose slots it serves: its own if it is a master, its master's if
// it is a replica with a live link, "" if it is a replica without one.
func (s *Server) masterOf(ctx context.Context) (string, error) {
	cl := redis.NewClient(&redis.Options{Addr: s.Addr, MaxRetries: -1})
	defer cl.Close()
	info, err := cl.Info(ctx, "replication").Result()
	if err != nil {
		return "", fmt.Errorf("node %s: INFO replication: %w", s.Addr, err)
	}
	fields := map[string]string{}
	for _, line := range strings.Split(info, "\r\n") {
		if k, v, ok := strings.Cut(line, ":"); ok {
			fields[k] = v
		}
	}
	switch {
	case fields["role"] == "master":
		return s.Addr, nil
	case fields["master_link_status"] == "up" && fields["master_sync_in_progress"] == "0":
		return net.JoinHostPort(fields["master_host"], fields["master_port"]), nil
	}
	return "", nil
}

// MasterOf returns the node that is now the master of key's slot, by the
// slot map of the first running node.
func (c *Cluster) MasterOf(tb testing.TB, key string) *Server {
	tb.Helper()
	return c.slotNodes(tb, key)[0]
}

// ReplicasOf returns the replicas of key's slot that the first running
// node lists for it (synced and not failed).
func (c *Cluster) ReplicasOf(tb testing.TB, key string) []*Server {
	tb.Helper()
	return c.slotNodes(tb, key)[1:]
}

// slotNodes returns the master and the replicas of key's slot, by the slot
// map of the first running node.
func (c *Cluster) slotNodes(tb testing.TB, key string) []*Server {
	tb.Helper()
	ctx := context.Background()
	for _, s := range c.nodes {
		if s.cmd == nil {
			continue
		}
		cl := redis.NewClient(&redis.Options{Addr: s.Addr, MaxRetries: -1})
		defer cl.Close()
		slot, err := cl.ClusterKeySlot(ctx, key).Result()
		if err != nil {
			tb.Fatalf("redistest: CLUSTER KEYSLOT %s on %s: %v", key, s.Addr, err)
		}
		//lint:ignore SA1019 CLUSTER SLOTS lists a replica only once it is synced, which is what this waits for; CLUSTER SHARDS lists it at once
		slots, err := cl.ClusterSlots(ctx).Result()
		if err != nil {
			tb.Fatalf("redistest: CLUSTER SLOTS on %s: %v", s.Addr, err)
		}
		for _, r := range slots {
			if int64(r.Start) > slot || slot > int64(r.End) || len(r.Nodes) == 0 {
				continue
			}
			var out []*Server
			for _, n := range r.Nodes {
				for _, node := range c.nodes {
					if node.Addr == n.Addr {
						out = append(out, node)
					}
				}
			}
			if len(out) != len(r.Nodes) {
				tb.Fatalf("redistest: slot %d lists nodes %v not in this cluster", slot, r.Nodes)
			}
			return out
		}
		tb.Fatalf("redistest: no master of slot %d in %s's map", slot, s.Addr)
	}
	tb.Fatal("redistest: no running node")
	return nil
}

// AwaitHealthy waits until the running nodes have settled into a whole
// cluster again: after a master was stopped, until one of its replicas has
// taken over its slots and every running node agrees (the conditions of
// StartClusterWith's return, over the running nodes). It fails tb after 30 s.
func (c *Cluster) AwaitHealthy(tb testing.TB) {
	tb.Helper()
	c.awaitOK(tb)
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
// config, and returns once the cluster is ok again (see AwaitHealthy). The
// nodes come back empty; a master that was failed over comes back as a
// replica of the node that took over.
func (c *Cluster) Restart(tb testing.TB) {
	tb.Helper()
	for _, s := range c.nodes {
		if s.cmd == nil {
			s.Restart(tb)
		}
	}
	c.awaitOK(tb)
}

// start runs a redis-server; extra non-nil makes it a cluster node with
// those arguments added.
func start(tb testing.TB, extra []string) *Server {
	tb.Helper()
	var lastErr error
	// A free port can be taken by someone else between our probe and
	// redis-server's bind (or, for a cluster node, its bus port 10000
	// above); try a few ports.
	for range 5 {
		s, err := tryStart(tb, extra)
		if err == nil {
			return s
		}
		lastErr = err
	}
	tb.Fatalf("redistest: cannot start %s: %v", Binary, lastErr)
	return nil
}

func tryStart(tb testing.TB, extra []string) (*Server, error) {
	cluster := extra != nil
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
		args = append(args, extra...)
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
