package breaker_test

import (
	"encoding/json"
	"errors"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/redis/go-redis/v9"
	"github.com/sony/gobreaker/v2"
	"go.uber.org/goleak"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
)

func TestMain(m *testing.M) { goleak.VerifyTestMain(m) }

// run makes calls with the given outcomes, stopping at the first refusal;
// it returns how many were allowed.
func run(t *testing.T, b *breaker.Breaker, outcomes ...breaker.Outcome) int {
	t.Helper()
	for i, o := range outcomes {
		p, err := b.Allow()
		if err != nil {
			assert.ErrorIs(t, err, breaker.ErrOpen, "Allow: %v, want an OpenError", err)
			return i
		}
		p.Done(o)
	}
	return len(outcomes)
}

func repeat(o breaker.Outcome, n int) []breaker.Outcome {
	out := make([]breaker.Outcome, n)
	for i := range out {
		out[i] = o
	}
	return out
}

func TestTripRules(t *testing.T) {
	S, F, I := breaker.Success, breaker.Failure, breaker.Ignored
	tests := []struct {
		name     string
		set      breaker.Settings
		outcomes []breaker.Outcome
		allowed  int // calls let through before the first refusal
	}{
		{"three in a row", breaker.Settings{ConsecutiveFailures: 3, FailureRatio: -1}, repeat(F, 10), 3},
		{"a success resets the run", breaker.Settings{ConsecutiveFailures: 3, FailureRatio: -1}, []breaker.Outcome{F, F, S, F, F, S, F, F, F, S}, 9},
		{"ignored outcomes do not count", breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1}, []breaker.Outcome{F, I, I, I, F, S}, 5},
		{"successes never trip", breaker.Settings{ConsecutiveFailures: 1}, repeat(S, 50), 50},
		// Ratio 0.5 over at least 10 calls: S,F alternating reaches 5 of
		// 10 failed at the 10th call.
		{"failure ratio", breaker.Settings{ConsecutiveFailures: -1, FailureRatio: 0.5, MinRequests: 10}, []breaker.Outcome{S, F, S, F, S, F, S, F, S, F, S, S}, 10},
		{"ratio needs min requests", breaker.Settings{ConsecutiveFailures: -1, FailureRatio: 0.1, MinRequests: 10}, []breaker.Outcome{F, S, S, S, S, S, S, S, S}, 9},
		{"off", breaker.Settings{Off: true}, repeat(F, 30), 30},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var trips atomic.Int32
			b, err := breaker.New("up", tt.set, nil, breaker.Hooks{OnTrip: func() { trips.Add(1) }})
			require.NoError(t, err)
			got := run(t, b, tt.outcomes...)
			assert.Equal(t, tt.allowed, got, "allowed %d calls, want %d", got, tt.allowed)
			wantTrips := int32(0)
			if tt.allowed < len(tt.outcomes) {
				wantTrips = 1
			}
			assert.Equal(t, wantTrips, trips.Load(), "trips = %d, want %d", trips.Load(), wantTrips)
		})
	}
}

func TestOpenErrorSaysWhenProbesStart(t *testing.T) {
	b, err := breaker.New("up", breaker.Settings{ConsecutiveFailures: 1, OpenFor: 30 * time.Second}, nil, breaker.Hooks{})
	require.NoError(t, err)
	t0 := time.Date(2026, 6, 1, 9, 0, 0, 0, time.UTC)
	b.SetClock(func() time.Time { return t0 })
	run(t, b, breaker.Failure)
	_, err = b.Allow()
	var oe *breaker.OpenError
	require.True(t, errors.As(err, &oe), "Allow after a trip: %v", err)
	want := t0.Add(30 * time.Second)
	assert.True(t, oe.Until.Equal(want), "Until = %v, want the trip's time plus OpenFor, %v", oe.Until, want)
	// RFC 9110 section 10.2.3: Retry-After in whole seconds, so the time
	// left rounds up, and never below one second.
	for _, tc := range []struct {
		at   time.Duration
		want time.Duration
	}{
		{0, 30 * time.Second},
		{10*time.Second + 500*time.Millisecond, 20 * time.Second},
		{29*time.Second + time.Millisecond, time.Second},
		{30 * time.Second, time.Second},
		{time.Minute, time.Second},
	} {
		got := oe.RetryAfter(t0.Add(tc.at))
		assert.Equal(t, tc.want, got, "RetryAfter(trip + %v) = %v, want %v", tc.at, got, tc.want)
	}
}

// awaitState polls b until it reports want (gobreaker's open timer runs on
// the real clock).
func awaitState(t *testing.T, b *breaker.Breaker, want gobreaker.State) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for {
		if st, _ := b.State(); st == want {
			return
		}
		if time.Now().After(deadline) {
			st, _ := b.State()
			require.Failf(t, "breaker did not change state", "breaker stayed %v, want %v", st, want)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

func TestHalfOpenProbe(t *testing.T) {
	for _, tc := range []struct {
		name  string
		probe breaker.Outcome
		want  gobreaker.State
	}{{"success closes", breaker.Success, gobreaker.StateClosed}, {"failure reopens", breaker.Failure, gobreaker.StateOpen}} {
		t.Run(tc.name, func(t *testing.T) {
			b, err := breaker.New("up", breaker.Settings{ConsecutiveFailures: 1, OpenFor: 50 * time.Millisecond}, nil, breaker.Hooks{})
			require.NoError(t, err)
			run(t, b, breaker.Failure)
			awaitState(t, b, gobreaker.StateHalfOpen)
			probe, err := b.Allow()
			require.NoError(t, err, "first half-open call")
			_, err = b.Allow()
			require.ErrorIs(t, err, breaker.ErrOpen, "second call while the probe is out: %v, want refused", err)
			probe.Done(tc.probe)
			st, _ := b.State()
			assert.Equal(t, tc.want, st, "after the probe: %v, want %v", st, tc.want)
		})
	}
}

func TestSharedStateAcrossReplicas(t *testing.T) {
	// On a standalone Redis and on a real 3-master cluster, where the
	// breaker's state, lock and record keys are routed by their one slot.
	backends := []struct {
		name   string
		client func(t *testing.T) func(t *testing.T) redis.UniversalClient
	}{
		{"standalone", func(t *testing.T) func(t *testing.T) redis.UniversalClient {
			s := redistest.Start(t)
			return func(t *testing.T) redis.UniversalClient { return s.Client(t) }
		}},
		{"cluster", func(t *testing.T) func(t *testing.T) redis.UniversalClient {
			c := redistest.StartCluster(t, 3)
			return func(t *testing.T) redis.UniversalClient { return c.Client(t) }
		}},
	}
	for _, be := range backends {
		t.Run(be.name, func(t *testing.T) { testSharedStateAcrossReplicas(t, be.client(t)) })
	}
}

func testSharedStateAcrossReplicas(t *testing.T, client func(t *testing.T) redis.UniversalClient) {
	newReplica := func(c *atomic.Int32) *breaker.Breaker {
		st, err := redisstate.New(client(t), redisstate.Options{Prefix: "t"})
		require.NoError(t, err)
		b, err := breaker.New("shared-up", breaker.Settings{ConsecutiveFailures: 4, FailureRatio: -1, OpenFor: 1500 * time.Millisecond}, st,
			breaker.Hooks{OnTrip: func() { c.Add(1) }, OnStoreError: func(err error) { assert.Failf(t, "store error", "%v", err) }})
		require.NoError(t, err)
		return b
	}
	var tripsA, tripsB atomic.Int32
	a, b := newReplica(&tripsA), newReplica(&tripsB)
	// Failures split between the replicas add up: A sees two, B two.
	run(t, a, breaker.Failure, breaker.Failure)
	run(t, b, breaker.Failure)
	st, _ := a.State()
	require.Equal(t, gobreaker.StateClosed, st, "after 3 of 4 failures: %v", st)
	run(t, b, breaker.Failure)
	for name, r := range map[string]*breaker.Breaker{"A": a, "B": b} {
		_, err := r.Allow()
		assert.ErrorIs(t, err, breaker.ErrOpen, "replica %s after the 4th failure: %v, want open", name, err)
	}
	assert.Equal(t, int32(1), tripsA.Load()+tripsB.Load(), "trips A %d + B %d, want 1 in all", tripsA.Load(), tripsB.Load())
	// A probe on A closes it for B too.
	awaitState(t, b, gobreaker.StateHalfOpen)
	p, err := a.Allow()
	require.NoError(t, err)
	p.Done(breaker.Success)
	st, _ = b.State()
	assert.Equal(t, gobreaker.StateClosed, st, "B after A's probe succeeded: %v, want closed", st)
}

func TestStoreOutageFallsBackToLocalState(t *testing.T) {
	srv := redistest.Start(t)
	st, err := redisstate.New(srv.Client(t), redisstate.Options{Timeout: 100 * time.Millisecond})
	require.NoError(t, err)
	var storeErrs atomic.Int32
	b, err := breaker.New("up", breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1}, st,
		breaker.Hooks{OnStoreError: func(error) { storeErrs.Add(1) }})
	require.NoError(t, err)
	run(t, b, breaker.Success)
	srv.Stop()
	// Local state counts from the outage on and still trips.
	got := run(t, b, repeat(breaker.Failure, 5)...)
	assert.Equal(t, 2, got, "allowed %d failing calls during the outage, want 2", got)
	assert.NotEqual(t, int32(0), storeErrs.Load(), "no store error reported")
}

func TestSettingsValidate(t *testing.T) {
	for _, s := range []breaker.Settings{
		{ConsecutiveFailures: -2},
		{FailureRatio: 1.5},
		{MinRequests: -1},
		{Window: -time.Second},
		{OpenFor: -time.Second},
		{Probes: -1},
		{ConsecutiveFailures: -1, FailureRatio: -1},
	} {
		_, err := breaker.New("x", s, nil, breaker.Hooks{})
		assert.Error(t, err, "%+v accepted", s)
	}
}

// Outcomes recorded at once from many goroutines on two replicas are all
// counted in the shared state: the lock loses no update.
func TestSharedRecordsLoseNoUpdate(t *testing.T) {
	srv := redistest.Start(t)
	c := srv.Client(t)
	var storeErrs atomic.Int32
	var replicas []*breaker.Breaker
	for range 2 {
		st, err := redisstate.New(c, redisstate.Options{Prefix: "count"})
		require.NoError(t, err)
		b, err := breaker.New("busy-up", breaker.Settings{ConsecutiveFailures: 100000, FailureRatio: -1, Window: time.Hour}, st,
			breaker.Hooks{OnStoreError: func(error) { storeErrs.Add(1) }})
		require.NoError(t, err)
		replicas = append(replicas, b)
	}
	const workers, each = 32, 10
	var wg sync.WaitGroup
	for w := range workers {
		wg.Go(func() {
			for range each {
				run(t, replicas[w%2], breaker.Failure)
			}
		})
	}
	wg.Wait()
	n := storeErrs.Load()
	require.Equal(t, int32(0), n, "%d store errors under contention", n)
	raw, err := c.Get(t.Context(), "count:breaker:{busy-up}:state").Bytes()
	require.NoError(t, err)
	var s gobreaker.SharedState
	require.NoError(t, json.Unmarshal(raw, &s))
	assert.Equal(t, uint32(workers*each), s.Counts.TotalFailures, "shared state counts %d failures, want %d", s.Counts.TotalFailures, workers*each)
}
