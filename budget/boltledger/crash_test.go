package boltledger_test

import (
	"bufio"
	"context"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// crashEnv names the database file a re-executed test binary holds
// reservations in before it is killed.
const crashEnv = "STINT_BOLTLEDGER_CRASH_DB"

var crashT0 = time.Date(2026, 5, 6, 7, 0, 0, 0, time.UTC)

const crashLease = 30 * time.Second

// TestCrashHolder is not a test of its own: when crashEnv is set it is the
// child process of TestCrashSettlesLeases. It reserves, reports the
// reservations on stdout, and then blocks until it is killed.
func TestCrashHolder(t *testing.T) {
	path := os.Getenv(crashEnv)
	if path == "" {
		t.Skip("helper process for TestCrashSettlesLeases")
	}
	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: 5 * time.Second})
	if err != nil {
		fmt.Println("error", err)
		os.Exit(1)
	}
	l, err := boltledger.New(db, boltledger.Options{})
	if err != nil {
		fmt.Println("error", err)
		os.Exit(1)
	}
	caps := budget.Caps{Team: &budget.Cap{Limit: budget.NanosPerUSD, Period: budget.Month}}
	for i := range 5 {
		res, err := l.Reserve(context.Background(), crashT0, budget.Request{
			Team: "lab", Key: "k1", Amount: budget.Nanos(1000 * (i + 1)), Caps: caps, Lease: crashLease})
		if err != nil {
			fmt.Println("error", err)
			os.Exit(1)
		}
		fmt.Println("held", res.ID, int64(res.Amount))
	}
	fmt.Println("ready")
	select {} // hold the reservations (and the file lock) until SIGKILL
}

// TestCrashSettlesLeases kills a real process holding reservations with
// SIGKILL; after the lease expires the sweep charges them at the reserved
// amount.
func TestCrashSettlesLeases(t *testing.T) {
	path := filepath.Join(t.TempDir(), "stint.db")
	cmd := exec.Command(os.Args[0], "-test.run=^TestCrashHolder$", "-test.count=1")
	cmd.Env = append(os.Environ(), crashEnv+"="+path)
	out, err := cmd.StdoutPipe()
	require.NoError(t, err)
	require.NoError(t, cmd.Start())
	held := map[string]budget.Nanos{}
	var sum budget.Nanos
	sc := bufio.NewScanner(out)
	for sc.Scan() {
		f := strings.Fields(sc.Text())
		if len(f) == 1 && f[0] == "ready" {
			break
		}
		if len(f) == 3 && f[0] == "held" {
			n, _ := strconv.ParseInt(f[2], 10, 64)
			held[f[1]] = budget.Nanos(n)
			sum += budget.Nanos(n)
			continue
		}
		require.False(t, strings.HasPrefix(sc.Text(), "error"), "child: %s", sc.Text())
	}
	if len(held) != 5 {
		_ = cmd.Process.Kill()
		require.Len(t, held, 5, "reservations the child reported")
	}
	require.NoError(t, cmd.Process.Signal(syscall.SIGKILL))
	require.Error(t, cmd.Wait(), "the child exited cleanly, want killed")

	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: 5 * time.Second})
	require.NoError(t, err, "reopen after kill")
	defer db.Close()
	l := newLedger(t, db, nil)
	ctx := context.Background()
	team := budget.Scope{Team: "lab"}
	b, err := l.Balance(ctx, crashT0, team, budget.Month)
	require.NoError(t, err, "balance after kill")
	require.Equal(t, budget.Balance{Held: sum}, b, "balance after kill")
	none, err := l.Expire(ctx, crashT0.Add(crashLease-time.Millisecond))
	require.NoError(t, err, "Expire before the deadline")
	require.Empty(t, none, "Expire before the deadline")
	got, err := l.Expire(ctx, crashT0.Add(crashLease))
	require.NoError(t, err, "Expire")
	for _, r := range got {
		assert.Equal(t, held[r.ID], r.Amount, "expired %s for what the child held", r.ID)
		delete(held, r.ID)
	}
	assert.Empty(t, held, "reservations not expired")
	b, err = l.Balance(ctx, crashT0, team, budget.Month)
	require.NoError(t, err, "balance after expiry")
	assert.Equal(t, budget.Balance{Spent: sum}, b, "after expiry: the reserved amounts spent, nothing held")
}
