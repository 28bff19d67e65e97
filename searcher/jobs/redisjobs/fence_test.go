package redisjobs

import (
	"context"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/internal/redistest"
	"github.com/stintlab/stint/searcher/jobs"
	"github.com/stintlab/stint/searcher/search"
)

// apiOnly opens a queue on rdb that runs no job itself, named name, so
// the test drives its claims.
func apiOnly(t *testing.T, rdb redis.UniversalClient, name string, lease time.Duration) *Queue {
	t.Helper()
	q, err := Open(context.Background(), rdb, nil, Options{Name: name, Jobs: -1, Lease: lease, Prefix: "fence"})
	require.NoError(t, err)
	t.Cleanup(q.Close)
	return q
}

// submitStub queues a job whose task file is a stub: these tests claim and
// fence jobs, they never run one.
func submitStub(t *testing.T, ctx context.Context, q *Queue) jobs.Status {
	t.Helper()
	taskFile := filepath.Join(t.TempDir(), "task.yaml")
	require.NoError(t, os.WriteFile(taskFile, []byte("name: x\n"), 0o600))
	st, err := q.Submit(ctx, jobs.Spec{Task: taskFile})
	require.NoError(t, err)
	return st
}

// TestWritesOfALostClaimAreRefused: sidecar a takes a job, its claim runs
// past the lease, b takes it; every write of a's (checkpoint, end,
// heartbeat, hand-back) is then refused and b's land. On a standalone
// server and on a 3-master Cluster (the scripts' keys share one slot).
func TestWritesOfALostClaimAreRefused(t *testing.T) {
	tests := []struct {
		name  string
		redis func(t *testing.T) redis.UniversalClient
	}{
		{"redis", func(t *testing.T) redis.UniversalClient { return redistest.Start(t).Client(t) }},
		{"cluster", func(t *testing.T) redis.UniversalClient { return redistest.StartCluster(t, 3).Client(t) }},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			ctx := context.Background()
			rdb := tt.redis(t)
			const lease = 300 * time.Millisecond
			a, b := apiOnly(t, rdb, "a", lease), apiOnly(t, rdb, "b", lease)
			st := submitStub(t, ctx, a)

			ca, err := a.claim(ctx)
			require.NoError(t, err)
			require.NotNil(t, ca)
			assert.EqualValues(t, 1, ca.epoch)
			assert.False(t, ca.resume)
			ka := checkpoints{q: a, ctx: ctx, c: ca}
			require.NoError(t, ka.Save(&search.State{Step: 1}))

			// Within the lease b finds nothing to take.
			cb, err := b.claim(ctx)
			require.NoError(t, err)
			assert.Nil(t, cb)
			time.Sleep(lease + 100*time.Millisecond)
			cb, err = b.claim(ctx)
			require.NoError(t, err)
			require.NotNil(t, cb, "b took nothing past a's lease")
			assert.EqualValues(t, 2, cb.epoch)
			assert.True(t, cb.resume, "b does not resume from a's checkpoint")

			assert.ErrorIs(t, ka.Save(&search.State{Step: 2}), ErrFenced, "a's checkpoint after losing the claim")
			res, err := a.beat(ctx, ca, []byte(`{}`))
			require.NoError(t, err)
			assert.Equal(t, "lost", res)
			r := &running{status: cb.status}
			a.finish(ctx, ca, r, jobs.Done, "")
			a.release(ctx, ca, r)
			got, err := a.Get(ctx, st.ID)
			require.NoError(t, err)
			assert.Equal(t, jobs.Running, got.State, "a's end or hand-back landed")
			assert.Equal(t, "b", got.Sidecar)

			kb := checkpoints{q: b, ctx: ctx, c: cb}
			require.NoError(t, kb.Save(&search.State{Step: 3}))
			epoch, err := rdb.HGet(ctx, b.k.ckpt(st.ID), "epoch").Int()
			require.NoError(t, err)
			assert.Equal(t, 2, epoch, "the checkpoint is not the new owner's")
			res, err = b.beat(ctx, cb, nil)
			require.NoError(t, err)
			assert.Equal(t, "ok", res)
			b.finish(ctx, cb, r, jobs.Done, "")
			got, err = b.Get(ctx, st.ID)
			require.NoError(t, err)
			assert.Equal(t, jobs.Done, got.State)
			n, err := rdb.HGet(ctx, b.k.job(st.ID), "finished").Int()
			require.NoError(t, err)
			assert.Equal(t, 1, n)
			left, err := rdb.XLen(ctx, b.k.queue()).Result()
			require.NoError(t, err)
			assert.Zero(t, left)
		})
	}
}

// TestCanceledJobIsNeverTaken: a job canceled while queued is dropped
// from the queue by the next claim, not run.
func TestCanceledJobIsNeverTaken(t *testing.T) {
	ctx := context.Background()
	rdb := redistest.Start(t).Client(t)
	q := apiOnly(t, rdb, "a", time.Second)
	st := submitStub(t, ctx, q)
	got, err := q.Cancel(ctx, st.ID)
	require.NoError(t, err)
	assert.Equal(t, jobs.Canceled, got.State)
	c, err := q.claim(ctx)
	require.NoError(t, err)
	assert.Nil(t, c)
	left, err := rdb.XLen(ctx, q.k.queue()).Result()
	require.NoError(t, err)
	assert.Zero(t, left)
	_, err = q.Cancel(ctx, "job-unknown")
	assert.ErrorIs(t, err, jobs.ErrNotFound)
}

// TestStaleClaimFoundBehindLiveOnes: a job whose claim ran out is taken
// even when more than ten live claims come before it in the pending list
// (XAUTOCLAIM scans ten entries per call).
func TestStaleClaimFoundBehindLiveOnes(t *testing.T) {
	ctx := context.Background()
	rdb := redistest.Start(t).Client(t)
	const lease = 400 * time.Millisecond
	a, b := apiOnly(t, rdb, "a", lease), apiOnly(t, rdb, "b", lease)
	const n = 12
	for range n {
		submitStub(t, ctx, a)
	}
	var claims []*claim
	for range n {
		c, err := a.claim(ctx)
		require.NoError(t, err)
		require.NotNil(t, c)
		claims = append(claims, c)
	}
	live, stale := claims[:n-1], claims[n-1]
	for range 2 {
		time.Sleep(lease * 6 / 10)
		for _, c := range live {
			res, err := a.beat(ctx, c, nil)
			require.NoError(t, err)
			require.Equal(t, "ok", res)
		}
	}
	got, err := b.claim(ctx)
	require.NoError(t, err)
	require.NotNil(t, got, "the stale claim behind %d live ones was not found", len(live))
	assert.Equal(t, stale.id, got.id)
}

// TestRetriedEndCountsOnce: storing a job's end again (a retry after a
// lost reply) succeeds and the job still finished once.
func TestRetriedEndCountsOnce(t *testing.T) {
	ctx := context.Background()
	rdb := redistest.Start(t).Client(t)
	q := apiOnly(t, rdb, "a", time.Second)
	st := submitStub(t, ctx, q)
	c, err := q.claim(ctx)
	require.NoError(t, err)
	require.NotNil(t, c)
	r := &running{status: c.status}
	r.update(func(s *jobs.Status) { s.State = jobs.Done })
	args := []any{group, c.entry, c.epoch, jobs.Done, r.snapshot(), q.nowMS()}
	keys := []string{q.k.queue(), q.k.job(c.id), q.k.out(c.id), q.k.ckpt(c.id)}
	for i := range 2 {
		n, err := finishScript.Run(ctx, rdb, keys, args...).Int()
		require.NoError(t, err)
		assert.Equal(t, 1, n, "try %d", i+1)
	}
	finished, err := rdb.HGet(ctx, q.k.job(st.ID), "finished").Int()
	require.NoError(t, err)
	assert.Equal(t, 1, finished)
	// Another end (another status) of the same run is refused.
	args[4] = []byte(`{"state":"failed"}`)
	n, err := finishScript.Run(ctx, rdb, keys, args...).Int()
	require.NoError(t, err)
	assert.Zero(t, n)
}

// TestAPIAnswers503WhileRedisIsDown: with the queue's Redis gone the job
// API says so (503 store_unavailable, Retry-After), and answers again once
// it is back.
func TestAPIAnswers503WhileRedisIsDown(t *testing.T) {
	rs := redistest.Start(t)
	rdb := redis.NewClient(&redis.Options{Addr: rs.Addr, MaxRetries: -1, DialTimeout: 200 * time.Millisecond})
	t.Cleanup(func() { rdb.Close() })
	q := apiOnly(t, rdb, "a", time.Second)
	api := httptest.NewServer(jobs.NewHandler(q))
	t.Cleanup(api.Close)
	get := func() (int, string, string) {
		resp, err := http.Get(api.URL + "/jobs")
		require.NoError(t, err)
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, resp.Header.Get("Retry-After"), string(b)
	}
	status, _, body := get()
	require.Equal(t, http.StatusOK, status, body)
	rs.Stop()
	status, retry, body := get()
	assert.Equal(t, http.StatusServiceUnavailable, status, body)
	assert.Equal(t, "1", retry)
	assert.Contains(t, body, `"code":"store_unavailable"`)
	rs.Restart(t)
	require.Eventually(t, func() bool { s, _, _ := get(); return s == http.StatusOK }, 10*time.Second, 50*time.Millisecond)
}
