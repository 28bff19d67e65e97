package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"os"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/opsview"
	"github.com/stintlab/stint/searcher/jobs"
	"github.com/stintlab/stint/searcher/task/tasktest"
)

// fleetLease is the sidecars' lease in these tests: short, so a dead
// sidecar's job is taken over quickly.
const fleetLease = "1s"

// fleet is a proxy on the real model, a Redis (or Cluster) and the search
// sidecars started on it, each a child process.
type fleet struct {
	t        *testing.T
	proxy    string // the proxy's API base
	config   string // the sidecars' config: store.redis only
	task     string
	rdb      redis.UniversalClient
	sidecars map[string]*child
	client   *http.Client // bounded: a stopped sidecar never answers
	// proxyChild is the proxy's process.
	proxyChild *child
	// gate stands between the sidecars and the proxy (proxy is its
	// address), so a test can hold a search at a step it has seen.
	gate *callGate
}

// callGate passes scoring calls on to the proxy. While it is shut, each
// call waits for a pass the test hands out (or for its client to go away),
// so a search stops between two calls until the test lets it go on: "in
// the middle of a search" is a state the test holds, not a moment it
// hopes to catch.
type callGate struct {
	mu     sync.Mutex
	opened chan struct{} // closed while the gate is open
	passes chan struct{}
}

func newCallGate() *callGate {
	g := &callGate{opened: make(chan struct{}), passes: make(chan struct{})}
	close(g.opened)
	return g
}

// wrap makes next wait at the gate.
func (g *callGate) wrap(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		g.mu.Lock()
		opened := g.opened
		g.mu.Unlock()
		select {
		case <-opened:
		case <-g.passes:
		case <-r.Context().Done():
			return
		}
		next.ServeHTTP(w, r)
	})
}

// shut makes every call from now on wait for a pass.
func (g *callGate) shut() {
	g.mu.Lock()
	defer g.mu.Unlock()
	select {
	case <-g.opened:
		g.opened = make(chan struct{})
	default:
	}
}

// open lets every call through, the waiting ones included.
func (g *callGate) open() {
	g.mu.Lock()
	defer g.mu.Unlock()
	select {
	case <-g.opened:
	default:
		close(g.opened)
	}
}

// pass lets one waiting call through, if one comes within wait, and
// says whether one did.
func (g *callGate) pass(wait time.Duration) bool {
	select {
	case g.passes <- struct{}{}:
		return true
	case <-time.After(wait):
		return false
	}
}

// fleetTask is the demo task cut to a few small steps, so a search runs
// for some seconds: long enough to be killed in the middle.
func fleetTask(t *testing.T, steps int) string {
	t.Helper()
	return tasktest.WriteExample(t, "steps: 90", "steps: "+strconv.Itoa(steps), "prompts_per_step: 16", "prompts_per_step: 2",
		"examples_per_step: 8", "examples_per_step: 4")
}

func newFleet(t *testing.T, addrs []string, rdb redis.UniversalClient, steps int) *fleet {
	t.Helper()
	model := modeltest.Path(t)
	p := startStint(t, nil, "serve", "--listen", "127.0.0.1:0", "--upstream", "local:"+model, "--data", t.TempDir())
	quoted := make([]string, len(addrs))
	for i, a := range addrs {
		quoted[i] = strconv.Quote(a)
	}
	cfg := writeConfig(t, fmt.Sprintf("store:\n  redis:\n    addrs: [%s]\n    timeout: 300ms\n    prefix: fleettest\n", strings.Join(quoted, ", ")))
	target, err := url.Parse("http://" + p.addr)
	require.NoError(t, err)
	gate := newCallGate()
	front := httptest.NewServer(gate.wrap(httputil.NewSingleHostReverseProxy(target)))
	t.Cleanup(front.Close)
	t.Cleanup(gate.open) // first: no call left waiting when the front closes
	return &fleet{t: t, proxy: front.URL + "/v1", config: cfg, task: fleetTask(t, steps), rdb: rdb, sidecars: map[string]*child{},
		client: &http.Client{Timeout: 5 * time.Second}, proxyChild: p, gate: gate}
}

// hold shuts the gate before the proxy: searches go on only by the passes
// awaitHeld hands out.
func (f *fleet) hold() { f.gate.shut() }

// release opens the gate again.
func (f *fleet) release() { f.gate.open() }

// awaitHeld hands out one scoring call at a time until the fleet's jobs
// satisfy cond, and returns them; with the gate shut nothing moves on
// after that until release.
func (f *fleet) awaitHeld(what string, cond func([]jobs.Status) bool) []jobs.Status {
	f.t.Helper()
	return f.poll(what, cond, func(l []jobs.Status) {
		if !f.gate.pass(50 * time.Millisecond) {
			return
		}
		// One call more: wait until a status shows it (statuses are
		// stored on the heartbeat), so the jobs never run ahead of what
		// cond has seen by more than a call or two.
		calls := callsOf(l)
		for seen := time.Now(); time.Since(seen) < 3*time.Second; time.Sleep(50 * time.Millisecond) {
			if now := f.list(); now != nil && callsOf(now) > calls {
				return
			}
		}
	})
}

// callsOf is the scoring calls the jobs' statuses count.
func callsOf(l []jobs.Status) int {
	n := 0
	for _, s := range l {
		n += s.Calls
	}
	return n
}

// start runs sidecar name; extra flags override the test's.
func (f *fleet) start(name string, extra ...string) *child {
	f.t.Helper()
	args := []string{"search", "serve", "--listen", "127.0.0.1:0", "--config", f.config,
		"--proxy", f.proxy, "--data", f.t.TempDir(), "--checkpoint-every", "1", "--lease", fleetLease, "--poll", "100ms", "--name", name}
	c := startStint(f.t, []string{"STINT_MODEL=" + modeltest.Path(f.t)}, append(args, extra...)...)
	f.sidecars[name] = c
	return c
}

// api is any live sidecar's address.
func (f *fleet) api() string {
	for _, c := range f.sidecars {
		select {
		case <-c.exited:
		default:
			if c.cmd.Process.Signal(syscall.Signal(0)) == nil && !f.paused(c) {
				return "http://" + c.addr
			}
		}
	}
	f.t.Fatal("no sidecar left")
	return ""
}

// paused reports whether c is stopped (SIGSTOP); such a sidecar does not
// answer.
func (f *fleet) paused(c *child) bool {
	b, err := readProcStat(c.cmd.Process.Pid)
	return err == nil && b == 'T'
}

// readProcStat returns a process's state letter from /proc/PID/stat (T:
// stopped).
func readProcStat(pid int) (byte, error) {
	b, err := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/stat")
	if err != nil {
		return 0, err
	}
	i := bytes.LastIndexByte(b, ')')
	if i < 0 || i+2 >= len(b) {
		return 0, fmt.Errorf("unreadable /proc/%d/stat", pid)
	}
	return b[i+2], nil
}

// cpuTime is the user and system time a process has used so far
// (/proc/PID/stat utime and stime, in clock ticks of 1/100 s).
func cpuTime(t *testing.T, pid int) time.Duration {
	t.Helper()
	b, err := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/stat")
	require.NoError(t, err)
	fields := strings.Fields(string(b[bytes.LastIndexByte(b, ')')+2:]))
	utime, err := strconv.Atoi(fields[11])
	require.NoError(t, err)
	stime, err := strconv.Atoi(fields[12])
	require.NoError(t, err)
	return time.Duration(utime+stime) * 10 * time.Millisecond
}

func (f *fleet) submit() jobs.Status {
	f.t.Helper()
	resp, err := f.client.Post(f.api()+"/jobs", "application/json", strings.NewReader(`{"task": `+strconv.Quote(f.task)+`}`))
	require.NoError(f.t, err)
	defer resp.Body.Close()
	var st jobs.Status
	require.Equal(f.t, http.StatusCreated, resp.StatusCode)
	require.NoError(f.t, json.NewDecoder(resp.Body).Decode(&st))
	return st
}

// list asks a sidecar for every job; nil while none answers.
func (f *fleet) list() []jobs.Status {
	resp, err := f.client.Get(f.api() + "/jobs")
	if err != nil {
		return nil
	}
	defer resp.Body.Close()
	var l struct{ Jobs []jobs.Status }
	if resp.StatusCode != http.StatusOK || json.NewDecoder(resp.Body).Decode(&l) != nil {
		return nil
	}
	return l.Jobs
}

// await polls the job list (bounded) until cond holds of it.
func (f *fleet) await(what string, cond func([]jobs.Status) bool) []jobs.Status {
	f.t.Helper()
	return f.poll(what, cond, func([]jobs.Status) { time.Sleep(50 * time.Millisecond) })
}

// poll lists the fleet's jobs until cond holds of them (for at most five
// minutes), doing between after every list that does not satisfy it.
func (f *fleet) poll(what string, cond func([]jobs.Status) bool, between func([]jobs.Status)) []jobs.Status {
	f.t.Helper()
	deadline := time.Now().Add(5 * time.Minute)
	for {
		l := f.list()
		if l != nil && cond(l) {
			return l
		}
		if time.Now().After(deadline) {
			f.t.Fatalf("never %s: %+v", what, l)
		}
		between(l)
	}
}

func allEnded(l []jobs.Status) bool {
	for _, s := range l {
		if s.State == jobs.Queued || s.State == jobs.Running {
			return false
		}
	}
	return true
}

// output fetches a finished job's file from a sidecar.
func (f *fleet) output(id, name string) []byte {
	f.t.Helper()
	resp, err := f.client.Get(f.api() + "/jobs/" + id + "/out/" + name)
	require.NoError(f.t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(f.t, err)
	require.Equal(f.t, http.StatusOK, resp.StatusCode, "%s of %s: %s", name, id, b)
	return b
}

// checkExactlyOnce checks every job ended done, once (the finish script
// ran once for it), the queue holds nothing, and every job's results.json
// and history.csv equal those of ref, a job that ran in one go.
func (f *fleet) checkExactlyOnce(l []jobs.Status) {
	f.t.Helper()
	ctx := context.Background()
	var ref *jobs.Status
	for i, s := range l {
		assert.Equal(f.t, jobs.Done, s.State, "job %s: %+v", s.ID, s)
		n, err := f.rdb.HGet(ctx, "{fleettest:search}:job:"+s.ID, "finished").Int()
		require.NoError(f.t, err)
		assert.Equal(f.t, 1, n, "job %s finished %d times", s.ID, n)
		if s.Attempts == 1 && ref == nil {
			ref = &l[i]
		}
	}
	require.NotNil(f.t, ref, "no job ran in one go")
	pending, err := f.rdb.XPending(ctx, "{fleettest:search}:queue", "sidecars").Result()
	require.NoError(f.t, err)
	assert.Zero(f.t, pending.Count, "entries still pending")
	left, err := f.rdb.XLen(ctx, "{fleettest:search}:queue").Result()
	require.NoError(f.t, err)
	assert.Zero(f.t, left, "entries left in the queue")
	// Source: the checkpoint contract (README "Prompt search"): a resumed
	// search follows exactly the trajectory of an uninterrupted one. The
	// local model's answers are not priced, so results hold nothing that
	// depends on the cache.
	for _, name := range []string{"results.json", "history.csv"} {
		want := f.output(ref.ID, name)
		for _, s := range l {
			got := f.output(s.ID, name)
			assert.True(f.t, bytes.Equal(want, got), "%s of %s (attempts %d, resumed after %d) differs from %s's:\n%s\nvs\n%s",
				name, s.ID, s.Attempts, s.Resumed, ref.ID, got, want)
		}
	}
}

// fleetBackends are the Redis setups the fleet's tests run on: a
// standalone server and a 3-master Cluster.
var fleetBackends = []struct {
	name  string
	redis func(t *testing.T) ([]string, redis.UniversalClient)
}{
	{"redis", func(t *testing.T) ([]string, redis.UniversalClient) {
		rs := redistest.Start(t)
		return []string{rs.Addr}, rs.Client(t)
	}},
	{"cluster", func(t *testing.T) ([]string, redis.UniversalClient) {
		cl := redistest.StartCluster(t, 3)
		return cl.Addrs, cl.Client(t)
	}},
}

func TestFleetResumesAKilledSidecarsSearch(t *testing.T) {
	for _, tt := range fleetBackends {
		t.Run(tt.name, func(t *testing.T) {
			addrs, rdb := tt.redis(t)
			f := newFleet(t, addrs, rdb, 8)
			for i := range 3 {
				f.start("sidecar-" + strconv.Itoa(i))
			}
			f.hold()
			for range 6 {
				f.submit()
			}
			// SIGKILL the sidecar of a job past its second step (with a
			// checkpoint every step) and before its end.
			var victim jobs.Status
			f.awaitHeld("a job in the middle", func(l []jobs.Status) bool {
				for _, s := range l {
					if s.State == jobs.Running && s.Step >= 2 && s.Step < s.Steps-2 {
						victim = s
						return true
					}
				}
				return false
			})
			killed := f.sidecars[victim.Sidecar]
			require.NotNil(t, killed, "job %s runs on %q", victim.ID, victim.Sidecar)
			require.NoError(t, killed.cmd.Process.Signal(syscall.SIGKILL))
			<-killed.exited
			f.release()
			died := time.Now()
			f.await("the killed sidecar's job taken over", func(l []jobs.Status) bool {
				for _, s := range l {
					if s.ID == victim.ID && s.Attempts > victim.Attempts && s.State == jobs.Running {
						return true
					}
				}
				return false
			})
			t.Logf("job %s resumed %s after its sidecar's SIGKILL (lease %s)", victim.ID, time.Since(died).Round(10*time.Millisecond), fleetLease)
			l := f.await("every job ended", allEnded)
			require.Len(t, l, 6)
			for _, s := range l {
				if s.ID == victim.ID {
					assert.NotEqual(t, victim.Sidecar, s.Sidecar, "the killed job's last sidecar")
					assert.Positive(t, s.Resumed, "the killed job did not resume from a checkpoint: %+v", s)
				}
			}
			f.checkExactlyOnce(l)
			f.checkOperatorPage(l)
		})
	}
}

// checkOperatorPage renders the operator page on one sidecar's job API:
// it lists every job of the fleet with the sidecar that ran it.
func (f *fleet) checkOperatorPage(l []jobs.Status) {
	f.t.Helper()
	const admin = "fleet-admin-key"
	mux := http.NewServeMux()
	opsview.New(opsview.Options{AdminKeyHashes: [][sha256.Size]byte{sha256.Sum256([]byte(admin))}, Sidecar: f.api(), MaxSearches: 20}).Route(mux)
	srv := httptest.NewServer(mux)
	defer srv.Close()
	req, _ := http.NewRequest(http.MethodGet, srv.URL+opsview.Prefix, nil)
	req.Header.Set("Authorization", "Bearer "+admin)
	resp, err := srv.Client().Do(req)
	require.NoError(f.t, err)
	defer resp.Body.Close()
	page, _ := io.ReadAll(resp.Body)
	require.Equal(f.t, http.StatusOK, resp.StatusCode, "%s", page)
	for _, s := range l {
		require.NotEmpty(f.t, s.Sidecar)
		assert.Contains(f.t, string(page), fmt.Sprintf(`data-figure="search-sidecar-%s" data-value="%s"`, s.ID, s.Sidecar))
	}
}

// TestFleetFencesAPausedSidecar: a sidecar stopped (SIGSTOP) past its
// lease loses its job to another; continued (SIGCONT), it finds its writes
// refused and stops, and the job finishes once, with the results of an
// uninterrupted run.
func TestFleetFencesAPausedSidecar(t *testing.T) {
	for _, tt := range fleetBackends {
		t.Run(tt.name, func(t *testing.T) {
			addrs, rdb := tt.redis(t)
			testFencesAPausedSidecar(t, newFleet(t, addrs, rdb, 10))
		})
	}
}

func testFencesAPausedSidecar(t *testing.T, f *fleet) {
	f.start("sidecar-a")
	f.start("sidecar-b")
	f.hold()
	job := f.submit()
	var owner jobs.Status
	f.awaitHeld("the job in the middle", func(l []jobs.Status) bool {
		owner = l[0]
		return owner.State == jobs.Running && owner.Step >= 2 && owner.Step < owner.Steps-3
	})
	paused := f.sidecars[owner.Sidecar]
	require.NoError(t, paused.cmd.Process.Signal(syscall.SIGSTOP))
	f.release()
	f.await("the job taken over", func(l []jobs.Status) bool {
		return l[0].Attempts > owner.Attempts && l[0].Sidecar != owner.Sidecar
	})
	require.NoError(t, paused.cmd.Process.Signal(syscall.SIGCONT))
	// The paused sidecar goes on where it was: it either learns it lost
	// the job or (unfenced) runs it to its end.
	lost, done := "job="+job.ID+" lost its claim", "job="+job.ID+" done"
	deadline := time.Now().Add(2 * time.Minute)
	for out := paused.output(); !strings.Contains(out, lost) && !strings.Contains(out, done); out = paused.output() {
		require.False(t, time.Now().After(deadline), "the continued sidecar never stopped or ended the job:\n%s", out)
		time.Sleep(20 * time.Millisecond)
	}
	assert.NotContains(t, paused.output(), done, "the paused sidecar stored the job's end")
	f.await("the job ended", allEnded)
	f.submit() // the uninterrupted run to compare with
	l := f.await("the second job ended", func(l []jobs.Status) bool { return len(l) == 2 && allEnded(l) })
	f.checkExactlyOnce(l)
}

// TestFleetCancelReachesTheRunningSidecar: a job canceled through one
// sidecar stops on the sidecar that runs it, and is never run again.
func TestFleetCancelReachesTheRunningSidecar(t *testing.T) {
	rs := redistest.Start(t)
	f := newFleet(t, []string{rs.Addr}, rs.Client(t), 40)
	f.start("sidecar-a")
	f.start("sidecar-b")
	f.hold()
	job := f.submit()
	var owner jobs.Status
	f.awaitHeld("the job running", func(l []jobs.Status) bool {
		owner = l[0]
		return owner.State == jobs.Running && owner.Step >= 1
	})
	other := "sidecar-a"
	if owner.Sidecar == other {
		other = "sidecar-b"
	}
	resp, err := f.client.Post("http://"+f.sidecars[other].addr+"/jobs/"+job.ID+"/cancel", "application/json", nil)
	f.release()
	require.NoError(t, err)
	resp.Body.Close()
	require.Equal(t, http.StatusOK, resp.StatusCode)
	waitForLog(t, f.sidecars[owner.Sidecar], "job="+job.ID+" canceled")
	l := f.list()
	require.Len(t, l, 1)
	assert.Equal(t, jobs.Canceled, l[0].State)
	assert.Less(t, l[0].Step, l[0].Steps, "the canceled job ran to its end")
	// Past a lease, nobody has taken it again.
	time.Sleep(1500 * time.Millisecond)
	l = f.list()
	require.Len(t, l, 1)
	assert.Equal(t, owner.Attempts, l[0].Attempts, "the canceled job was taken again")
	left, err := f.rdb.XLen(context.Background(), "{fleettest:search}:queue").Result()
	require.NoError(t, err)
	assert.Zero(t, left, "the canceled job's entry is still queued")
}

// TestFleetRidesOutARedisRestart: Redis restarts (saving and reloading its
// data) while sidecars run and hold queued jobs; they wait, carry on
// without a restart, and every job finishes once.
func TestFleetRidesOutARedisRestart(t *testing.T) {
	rs := redistest.Start(t)
	rdb := rs.Client(t)
	f := newFleet(t, []string{rs.Addr}, rdb, 6)
	f.start("sidecar-a")
	f.start("sidecar-b")
	f.hold()
	for range 3 {
		f.submit()
	}
	f.awaitHeld("a job running", func(l []jobs.Status) bool {
		for _, s := range l {
			if s.State == jobs.Running && s.Step >= 1 {
				return true
			}
		}
		return false
	})
	f.release() // the jobs go on as Redis goes away and comes back
	// SHUTDOWN SAVE writes the data set and exits, as a restart does.
	_ = rdb.ShutdownSave(context.Background()).Err()
	rs.Stop()
	time.Sleep(500 * time.Millisecond)
	rs.Restart(t)
	l := f.await("every job ended", func(l []jobs.Status) bool { return len(l) == 3 && allEnded(l) })
	f.checkExactlyOnce(l)
}

// TestFleetFigures measures what README "Several search sidecars" quotes:
// jobs per minute with 1, 2 and 3 sidecars on one proxy (its cache shared
// by all), and the time from a sidecar's SIGKILL to its job's resumption
// on an idle sidecar. It runs only with STINT_FLEET_FIGURES=1 (a minute
// or more of both cores); it checks every job ended once.
func TestFleetFigures(t *testing.T) {
	if os.Getenv("STINT_FLEET_FIGURES") == "" {
		t.Skip("set STINT_FLEET_FIGURES=1 to measure the fleet's figures")
	}
	const jobsPerRun = 6
	for _, n := range []int{1, 2, 3} {
		t.Run(fmt.Sprintf("sidecars=%d", n), func(t *testing.T) {
			rs := redistest.Start(t)
			f := newFleet(t, []string{rs.Addr}, rs.Client(t), 40)
			for i := range n {
				f.start("sidecar-" + strconv.Itoa(i))
			}
			start := time.Now()
			for range jobsPerRun {
				f.submit()
			}
			l := f.await("every job ended", func(l []jobs.Status) bool { return len(l) == jobsPerRun && allEnded(l) })
			took := time.Since(start)
			var cpu time.Duration
			for _, c := range f.sidecars {
				cpu += cpuTime(t, c.cmd.Process.Pid)
			}
			f.checkExactlyOnce(l)
			t.Logf("%d sidecars: %d jobs in %s: %.1f jobs per minute; the sidecars used %s of CPU, the proxy %s",
				n, jobsPerRun, took.Round(100*time.Millisecond), jobsPerRun/took.Minutes(), cpu.Round(100*time.Millisecond),
				cpuTime(t, f.proxyChild.cmd.Process.Pid).Round(100*time.Millisecond))
		})
	}
	t.Run("resumption", func(t *testing.T) {
		rs := redistest.Start(t)
		f := newFleet(t, []string{rs.Addr}, rs.Client(t), 20)
		f.start("sidecar-a")
		f.start("sidecar-b")
		var total time.Duration
		const kills = 3
		for i := range kills {
			job := f.submit()
			var owner jobs.Status
			f.await("the job in the middle", func(l []jobs.Status) bool {
				owner = l[0]
				return owner.ID == job.ID && owner.State == jobs.Running && owner.Step >= 2
			})
			victim := f.sidecars[owner.Sidecar]
			require.NoError(t, victim.cmd.Process.Signal(syscall.SIGKILL))
			<-victim.exited
			died := time.Now()
			f.await("the job taken over", func(l []jobs.Status) bool { return l[0].Attempts > owner.Attempts })
			took := time.Since(died)
			total += took
			t.Logf("kill %d: job resumed %s after the SIGKILL (lease %s, poll 100ms)", i+1, took.Round(10*time.Millisecond), fleetLease)
			f.start(owner.Sidecar + "-again")
			f.await("the job ended", allEnded)
		}
		t.Logf("mean time to resumption: %s", (total / kills).Round(10*time.Millisecond))
	})
}

// TestQueueFlagsNeedASharedQueue: the flags of a sidecar's part in a
// shared queue are refused without one, and bad values with one.
func TestQueueFlagsNeedASharedQueue(t *testing.T) {
	cfg := writeConfig(t, "store:\n  redis:\n    addrs: [\"127.0.0.1:1\"]\n")
	tests := []struct {
		args []string
		want string
	}{
		{[]string{"--jobs", "2"}, "--jobs: only for sidecars sharing a queue"},
		{[]string{"--lease", "5s", "--name", "a"}, "--lease, --name: only for sidecars sharing a queue"},
		{[]string{"--config", cfg, "--jobs", "0"}, "--jobs must be at least 1"},
		{[]string{"--config", cfg, "--lease", "10ms"}, "--lease at least 300ms"},
	}
	for _, tt := range tests {
		t.Run(strings.Join(tt.args, " "), func(t *testing.T) {
			out, err := runCLI(t, append([]string{"search", "serve", "--listen", "127.0.0.1:0", "--data", t.TempDir()}, tt.args...)...)
			require.Error(t, err, out)
			assert.Contains(t, err.Error(), tt.want)
		})
	}
}

// TestFleetHandsBackOnShutdown: a sidecar stopped with SIGTERM hands its
// running job back; another sidecar takes it at once (long before the
// lease, here a minute) and finishes it from its checkpoint.
func TestFleetHandsBackOnShutdown(t *testing.T) {
	rs := redistest.Start(t)
	// Statuses come every second with a long lease: a longer search, so
	// one is seen in the middle.
	f := newFleet(t, []string{rs.Addr}, rs.Client(t), 40)
	f.start("sidecar-a", "--lease", "1m")
	f.start("sidecar-b", "--lease", "1m")
	f.hold()
	job := f.submit()
	var owner jobs.Status
	f.awaitHeld("the job in the middle", func(l []jobs.Status) bool {
		owner = l[0]
		return owner.State == jobs.Running && owner.Step >= 2 && owner.Step < owner.Steps-15
	})
	stopped := f.sidecars[owner.Sidecar]
	require.NoError(t, stopped.cmd.Process.Signal(syscall.SIGTERM))
	<-stopped.exited
	f.release()
	assert.Contains(t, stopped.output(), "job="+job.ID+" handed back to the queue")
	l := f.await("the job ended", allEnded)
	assert.NotEqual(t, owner.Sidecar, l[0].Sidecar)
	assert.Positive(t, l[0].Resumed)
	f.submit() // the uninterrupted run to compare with
	l = f.await("the second job ended", func(l []jobs.Status) bool { return len(l) == 2 && allEnded(l) })
	f.checkExactlyOnce(l)
}
