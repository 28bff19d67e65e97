package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// cacheOutcome is the cache outcome an answer's Cache-Status reports.
func cacheOutcome(h http.Header) string { return proxy.CacheOutcome(h) }

// storeDown reports whether an answer's Cache-Status says the cache store
// was unavailable.
func storeDown(h http.Header) bool {
	cs, _ := proxy.ParseCacheStatus(h)
	return cs.Detail == proxy.DetailStoreUnavailable
}

// TestMain lets a test run the stint command itself in a child process:
// with STINT_TEST_MAIN set, the test binary is stint.
func TestMain(m *testing.M) {
	if args := os.Getenv("STINT_TEST_MAIN"); args != "" {
		var argv []string
		if err := json.Unmarshal([]byte(args), &argv); err != nil {
			fmt.Fprintln(os.Stderr, "bad STINT_TEST_MAIN:", err)
			os.Exit(2)
		}
		os.Args = append([]string{"stint"}, argv...)
		if n := os.Getenv("STINT_TEST_NOFILE"); n != "" {
			limitOpenFiles(n)
		}
		main()
		os.Exit(0)
	}
	os.Exit(m.Run())
}

// limitOpenFiles lowers the process's soft limit on open descriptors to n
// (a test's way to make a held connection cost something countable).
func limitOpenFiles(n string) {
	v, err := strconv.ParseUint(n, 10, 64)
	if err != nil {
		fmt.Fprintln(os.Stderr, "bad STINT_TEST_NOFILE:", err)
		os.Exit(2)
	}
	var lim syscall.Rlimit
	if err := syscall.Getrlimit(syscall.RLIMIT_NOFILE, &lim); err != nil {
		fmt.Fprintln(os.Stderr, "getrlimit:", err)
		os.Exit(2)
	}
	lim.Cur = min(v, lim.Max)
	if err := syscall.Setrlimit(syscall.RLIMIT_NOFILE, &lim); err != nil {
		fmt.Fprintln(os.Stderr, "setrlimit:", err)
		os.Exit(2)
	}
}

// child is a stint process started by a test.
type child struct {
	cmd  *exec.Cmd
	addr string
	mu   sync.Mutex
	logs bytes.Buffer
	// exited is closed when the process has been reaped; err is its result.
	exited chan struct{}
	err    error
}

var listenRE = regexp.MustCompile(`"?addr"?[=:]"?([0-9.:\[\]]+)`)

// startStint runs `stint args...` in a child process and waits until it
// listens.
func startStint(t *testing.T, env []string, args ...string) *child {
	t.Helper()
	argv, _ := json.Marshal(args)
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(append(os.Environ(), "STINT_TEST_MAIN="+string(argv)), env...)
	stderr, err := cmd.StderrPipe()
	require.NoError(t, err)
	c := &child{cmd: cmd, exited: make(chan struct{})}
	cmd.Stdout = childStdout{c} // what it prints on stdout joins its log
	require.NoError(t, cmd.Start())
	addrc := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			line := sc.Text()
			c.mu.Lock()
			c.logs.WriteString(line + "\n")
			c.mu.Unlock()
			if m := listenRE.FindStringSubmatch(line); m != nil && strings.Contains(line, "listening") {
				select {
				case addrc <- m[1]:
				default:
				}
			}
		}
		c.err = cmd.Wait()
		close(c.exited)
	}()
	t.Cleanup(func() {
		_ = cmd.Process.Kill()
		<-c.exited
	})
	select {
	case c.addr = <-addrc:
	case <-c.exited:
		require.FailNowf(t, "stint exited before listening", "stint exited before listening (%v):\n%s", c.err, c.output())
	case <-time.After(30 * time.Second):
		require.FailNowf(t, "stint did not start listening", "stint did not start listening:\n%s", c.output())
	}
	return c
}

// childStdout adds a child's standard output to its log.
type childStdout struct{ c *child }

func (w childStdout) Write(p []byte) (int, error) {
	w.c.mu.Lock()
	defer w.c.mu.Unlock()
	return w.c.logs.Write(p)
}

func (c *child) output() string {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.logs.String()
}

func (c *child) complete(t *testing.T, body string) (int, string, []byte) {
	t.Helper()
	resp, err := http.Post("http://"+c.addr+"/v1/completions", "application/json", strings.NewReader(body))
	require.NoError(t, err, "POST")
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, cacheOutcome(resp.Header), b
}

func greedyBody(i int) string {
	return fmt.Sprintf(`{"model":"quill-small","prompt":"crate number %d leaves the dock","temperature":0,"max_tokens":6}`, i)
}

// TestKilledProcessKeepsAcknowledgedEntries SIGKILLs a serving process and
// checks a new one on the same data dir answers every acknowledged call from
// the cache.
func TestKilledProcessKeepsAcknowledgedEntries(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	data := t.TempDir()
	args := []string{"serve", "--listen", "127.0.0.1:0", "--upstream", up.URL(), "--data", data}
	first := startStint(t, nil, args...)
	const n = 40
	for i := range n {
		status, outcome, body := first.complete(t, greedyBody(i))
		require.Falsef(t, status != 200 || outcome != "miss", "call %d: %d %s %s", i, status, outcome, body)
	}
	// Answers are stored right after they are sent: kill only once the
	// store has acknowledged every write.
	waitForMetric(t, first, "stint_store_pending_writes 0")
	require.NoError(t, first.cmd.Process.Signal(syscall.SIGKILL))
	<-first.exited
	calls := up.Calls().Completions

	second := startStint(t, nil, args...)
	for i := range n {
		status, outcome, body := second.complete(t, greedyBody(i))
		assert.Falsef(t, status != 200 || outcome != "hit", "after SIGKILL, call %d: %d %s %s", i, status, outcome, body)
	}
	got := up.Calls().Completions
	assert.Equal(t, calls, got, "upstream calls went from %d to %d after restart", calls, got)
}

// TestGracefulShutdownFinishesInFlight sends SIGTERM while a call is held
// upstream: the call still completes and the process exits cleanly.
func TestGracefulShutdownFinishesInFlight(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	c := startStint(t, nil, "serve", "--listen", "127.0.0.1:0", "--upstream", up.URL(), "--data", t.TempDir())
	up.Block()
	type result struct {
		status int
		err    error
	}
	resc := make(chan result, 1)
	go func() {
		resp, err := http.Post("http://"+c.addr+"/v1/completions", "application/json", strings.NewReader(greedyBody(1)))
		if err != nil {
			resc <- result{err: err}
			return
		}
		_, _ = io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		resc <- result{status: resp.StatusCode}
	}()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	require.NoError(t, up.AwaitHeld(ctx, 1))
	require.NoError(t, c.cmd.Process.Signal(syscall.SIGTERM))
	waitForLog(t, c, "shutting down")
	up.Release()
	res := <-resc
	require.Falsef(t, res.err != nil || res.status != 200, "in-flight call during shutdown: %d %v", res.status, res.err)
	<-c.exited
	require.NoErrorf(t, c.err, "stint exited with an error:\n%s", c.output())
}

func waitForMetric(t *testing.T, c *child, line string) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		resp, err := http.Get("http://" + c.addr + "/metrics")
		if err == nil {
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if strings.Contains(string(b), "\n"+line+"\n") {
				return
			}
		}
		require.Falsef(t, time.Now().After(deadline), "metrics never showed %q", line)
		time.Sleep(5 * time.Millisecond)
	}
}

func waitForLog(t *testing.T, c *child, text string) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for !strings.Contains(c.output(), text) {
		require.Falsef(t, time.Now().After(deadline), "log never said %q:\n%s", text, c.output())
		time.Sleep(5 * time.Millisecond)
	}
}

func TestServeRefusesOpenModeOffLoopback(t *testing.T) {
	_, err := resolveConfig(serveFlags{listen: "0.0.0.0:8787", upstream: "http://127.0.0.1:1/v1"})
	require.Falsef(t, err == nil || !strings.Contains(err.Error(), "refusing to listen"), "got %v, want a refusal", err)
	for _, addr := range []string{"127.0.0.1:8787", "[::1]:8787", "localhost:8787"} {
		_, err := resolveConfig(serveFlags{listen: addr, upstream: "http://127.0.0.1:1/v1"})
		assert.NoError(t, err, "%s: %v", addr, err)
	}
	_, err = resolveConfig(serveFlags{})
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "no upstream"), "no upstream: got %v", err)
}

func TestCheckConfigAndExample(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "stint.yaml")
	require.NoError(t, os.WriteFile(path, []byte(exampleConfig), 0o600))
	cmd := newRootCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetArgs([]string{"serve", "--config", path, "--check-config"})
	require.NoError(t, cmd.Execute(), "example config fails --check-config")
	assert.Contains(t, out.String(), "config ok", "output")
}

// TestServeWithLocalModelUpstream runs the proxy with the real local model
// in-process as its upstream. Check value: the model's published greedy
// output from BOS begins "Once upon a time, there was a little girl named
// Lily." (llama2.c doc/stories260K.md, recorded in shared/models/MODEL-SOURCE.md).
func TestServeWithLocalModelUpstream(t *testing.T) {
	model := modeltest.Path(t)
	c := startStint(t, nil, "serve", "--listen", "127.0.0.1:0", "--upstream", "local:"+model, "--data", t.TempDir())
	body := `{"model":"stories260K","prompt":"","temperature":0,"max_tokens":16}`
	var texts [2]string
	for i, want := range []string{"miss", "hit"} {
		status, outcome, b := c.complete(t, body)
		require.Falsef(t, status != 200 || outcome != want, "call %d: %d %s %s", i, status, outcome, b)
		var a struct {
			Choices []struct {
				Text string `json:"text"`
			} `json:"choices"`
		}
		err := json.Unmarshal(b, &a)
		require.Falsef(t, err != nil || len(a.Choices) != 1, "answer %s: %v", b, err)
		texts[i] = a.Choices[0].Text
	}
	const published = "Once upon a time, there was a little girl named Lily."
	assert.Truef(t, strings.HasPrefix(strings.TrimSpace(texts[0]), published), "greedy text %q does not start with %q", texts[0], published)
	assert.Equal(t, texts[1], texts[0], "hit %q differs from miss %q", texts[1], texts[0])
}
