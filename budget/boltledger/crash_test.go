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
		if strings.HasPrefix(sc.Text(), "error") {
			t.Fatalf("child: %s", sc.Text())
		}
	}
	if len(held) != 5 {
		_ = cmd.Process.Kill()
		t.Fatalf("child reported %d reservations, want 5", len(held))
	}
	require.NoError(t, cmd.Process.Signal(syscall.SIGKILL))
	if err := cmd.Wait(); err == nil {
		t.Fatal("child exited cleanly, want killed")
	}

	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: 5 * time.Second})
	require.NoError(t, err, "reopen after kill")
	defer db.Close()
	l := newLedger(t, db, nil)
	ctx := context.Background()
	team := budget.Scope{Team: "lab"}
	b, err := l.Balance(ctx, crashT0, team, budget.Month)
	if err != nil || b != (budget.Balance{Held: sum}) {
		t.Fatalf("after kill: balance %+v, %v; want %d held", b, err, sum)
	}
	if got, err := l.Expire(ctx, crashT0.Add(crashLease-time.Millisecond)); err != nil || len(got) != 0 {
		t.Fatalf("Expire before the deadline = %v, %v; want none", got, err)
	}
	got, err := l.Expire(ctx, crashT0.Add(crashLease))
	require.NoError(t, err, "Expire")
	for _, r := range got {
		if held[r.ID] != r.Amount {
			t.Errorf("expired %s for %d, child held %d", r.ID, r.Amount, held[r.ID])
		}
		delete(held, r.ID)
	}
	if len(held) != 0 {
		t.Errorf("reservations not expired: %v", held)
	}
	if b, err := l.Balance(ctx, crashT0, team, budget.Month); err != nil || b != (budget.Balance{Spent: sum}) {
		t.Errorf("after expiry: balance %+v, %v; want spent %d (the reserved amounts), nothing held", b, err, sum)
	}
}
