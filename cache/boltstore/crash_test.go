package boltstore_test

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/boltstore"
)

// The crash and lock tests re-execute this test binary as a helper process.
// helperEnv selects the helper's role; helperPathEnv names the store file.
const (
	helperEnv     = "STINT_BOLTSTORE_HELPER"
	helperPathEnv = "STINT_BOLTSTORE_HELPER_PATH"
)

func TestMain(m *testing.M) {
	switch os.Getenv(helperEnv) {
	case "":
		os.Exit(m.Run())
	case "writer":
		os.Exit(runWriter(os.Getenv(helperPathEnv)))
	case "holder":
		os.Exit(runHolder(os.Getenv(helperPathEnv)))
	default:
		fmt.Fprintf(os.Stderr, "unknown %s=%q\n", helperEnv, os.Getenv(helperEnv))
		os.Exit(2)
	}
}

// crashValue is the value the writer stores for entry i: sizes from a few
// bytes to about 20 kB, some compressible, some not.
func crashValue(i int) []byte {
	n := 10 + (i%9)*2500
	if i%2 == 0 {
		unit := []byte(fmt.Sprintf(`{"entry":%d,"text":"lantern orchard"}`, i))
		return bytes.Repeat(unit, n/len(unit)+1)[:n]
	}
	v := make([]byte, n)
	x := uint64(i)*0x9E3779B97F4A7C15 + 1
	for j := range v {
		x ^= x << 13
		x ^= x >> 7
		x ^= x << 17
		v[j] = byte(x)
	}
	return v
}

// runWriter Puts entries from two goroutines until it is killed, printing
// "ack <i>" after each Put that returned nil.
func runWriter(path string) int {
	s, err := boltstore.Open(path, boltstore.Options{SweepInterval: -1, MaxBytes: -1})
	if err != nil {
		fmt.Fprintln(os.Stderr, "writer: open:", err)
		return 1
	}
	var mu sync.Mutex // keeps ack lines whole
	var wg sync.WaitGroup
	for g := range 2 {
		wg.Go(func() {
			for i := g; ; i += 2 {
				ttl := time.Duration(0)
				if i%3 == 0 {
					ttl = time.Hour
				}
				if err := s.Put(context.Background(), k(i), crashValue(i), ttl); err != nil {
					fmt.Fprintln(os.Stderr, "writer: put:", err)
					os.Exit(1)
				}
				mu.Lock()
				fmt.Fprintf(os.Stdout, "ack %d\n", i)
				mu.Unlock()
			}
		})
	}
	wg.Wait()
	return 0
}

// runHolder opens the store, prints "ready" and holds it until stdin closes.
func runHolder(path string) int {
	s, err := boltstore.Open(path, boltstore.Options{SweepInterval: -1})
	if err != nil {
		fmt.Fprintln(os.Stderr, "holder: open:", err)
		return 1
	}
	fmt.Println("ready")
	_, _ = io.Copy(io.Discard, os.Stdin)
	if err := s.Close(); err != nil {
		fmt.Fprintln(os.Stderr, "holder: close:", err)
		return 1
	}
	return 0
}

func helper(t *testing.T, role, path string) *exec.Cmd {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(os.Environ(), helperEnv+"="+role, helperPathEnv+"="+path)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	t.Cleanup(func() {
		if t.Failed() && stderr.Len() > 0 {
			t.Logf("%s helper stderr:\n%s", role, stderr.String())
		}
	})
	return cmd
}

// TestSIGKILLKeepsAcknowledgedEntries kills a writing process mid-stream and
// checks that every entry it acknowledged is intact in the reopened file.
func TestSIGKILLKeepsAcknowledgedEntries(t *testing.T) {
	path := filepath.Join(t.TempDir(), "cache.db")
	cmd := helper(t, "writer", path)
	stdout, err := cmd.StdoutPipe()
	require.NoError(t, err)
	require.NoError(t, cmd.Start())
	const killAfter = 60
	var acked []int
	sc := bufio.NewScanner(stdout)
	killed := false
	for sc.Scan() {
		line := sc.Text()
		i, err := strconv.Atoi(strings.TrimPrefix(line, "ack "))
		if err != nil || !strings.HasPrefix(line, "ack ") {
			// A line cut off by the kill is not an acknowledgement.
			continue
		}
		acked = append(acked, i)
		if len(acked) == killAfter && !killed {
			// The writer keeps going while the signal is on its way, so the
			// kill lands in the middle of Puts.
			require.NoError(t, cmd.Process.Signal(syscall.SIGKILL))
			killed = true
		}
	}
	err = cmd.Wait()
	var exit *exec.ExitError
	require.True(t, killed, "the writer was killed")
	require.ErrorAs(t, err, &exit, "the writer's end after %d acks", len(acked))
	require.Equal(t, syscall.SIGKILL, exit.Sys().(syscall.WaitStatus).Signal(), "the writer died by SIGKILL")
	t.Logf("writer acknowledged %d entries before it died", len(acked))

	s := openStore(t, path, boltstore.Options{SweepInterval: -1, MaxBytes: -1})
	ctx := t.Context()
	for _, i := range acked {
		got, found, err := s.Get(ctx, k(i))
		assert.NoError(t, err, "acknowledged entry %d", i)
		assert.True(t, found && bytes.Equal(got, crashValue(i)), "acknowledged entry %d: found %v, intact %v", i, found, bytes.Equal(got, crashValue(i)))
	}
	checkStore(t, s)
	// The store takes writes again.
	require.NoError(t, s.Put(ctx, k(1<<30), []byte("after the crash"), 0), "Put after reopening")
	checkStore(t, s)
}

// TestOpenLockedFile: while another process holds the store, Open fails
// with ErrLocked after the lock timeout instead of hanging, and succeeds
// once that process has let go.
func TestOpenLockedFile(t *testing.T) {
	path := filepath.Join(t.TempDir(), "cache.db")
	cmd := helper(t, "holder", path)
	stdin, err := cmd.StdinPipe()
	require.NoError(t, err)
	stdout, err := cmd.StdoutPipe()
	require.NoError(t, err)
	require.NoError(t, cmd.Start())
	t.Cleanup(func() { _ = cmd.Process.Kill(); _ = cmd.Wait() })
	line, err := bufio.NewReader(stdout).ReadString('\n')
	require.NoError(t, err, "the holder's first line")
	require.Equal(t, "ready\n", line, "the holder's first line")
	for _, timeout := range []time.Duration{-1, 100 * time.Millisecond} {
		s, err := boltstore.Open(path, boltstore.Options{LockTimeout: timeout})
		if err == nil {
			_ = s.Close()
		}
		require.ErrorIs(t, err, boltstore.ErrLocked, "LockTimeout %v: Open of a file another process holds", timeout)
		assert.Contains(t, err.Error(), path, "LockTimeout %v: Open's error names the file", timeout)
	}
	require.NoError(t, stdin.Close())
	require.NoError(t, cmd.Wait(), "holder")
	s := openStore(t, path, boltstore.Options{LockTimeout: -1})
	checkStore(t, s)
}
