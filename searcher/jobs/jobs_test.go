package jobs_test

import (
	"bytes"
	"encoding/json"
	"math"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/jobs"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task/tasktest"
)

// rig is a model server on the completions wire format standing where the
// proxy would (the scorer needs only the wire format) and a task file.
type rig struct {
	model *localmodel.Model
	api   string
	task  string
}

func newRig(t *testing.T, steps int) rig {
	t.Helper()
	m, err := localmodel.Load(modeltest.Path(t))
	require.NoError(t, err)
	srv := httptest.NewServer(localmodel.NewHandler(m, localmodel.HandlerOptions{}))
	t.Cleanup(srv.Close)
	path := tasktest.WriteExample(t, "steps: 90", "steps: "+strconv.Itoa(steps), "prompts_per_step: 16", "prompts_per_step: 4",
		"examples_per_step: 8", "examples_per_step: 4")
	return rig{model: m, api: srv.URL + "/v1", task: path}
}

// waitFor polls the manager (bounded) until cond holds for job id.
func waitFor(t *testing.T, m *jobs.Manager, id string, what string, cond func(jobs.Status) bool) jobs.Status {
	t.Helper()
	deadline := time.Now().Add(2 * time.Minute)
	for {
		st, err := m.Get(id)
		require.NoError(t, err)
		if cond(st) {
			return st
		}
		require.Falsef(t, time.Now().After(deadline), "job %s never %s: %+v", id, what, st)
		time.Sleep(20 * time.Millisecond)
	}
}

func TestJobAPIRunsASearch(t *testing.T) {
	r := newRig(t, 3)
	m, err := jobs.Open(t.TempDir(), r.model, jobs.Options{Proxy: r.api})
	require.NoError(t, err)
	defer m.Close()
	api := httptest.NewServer(m.Handler())
	defer api.Close()

	post := func(path, body string) (int, []byte) {
		resp, err := http.Post(api.URL+path, "application/json", strings.NewReader(body))
		require.NoError(t, err)
		defer resp.Body.Close()
		var b bytes.Buffer
		_, _ = b.ReadFrom(resp.Body)
		return resp.StatusCode, b.Bytes()
	}
	for _, bad := range []string{`{"task": 7}`, `{"task": "/no/such/task.yaml"}`, `{"task": "x", "colour": 1}`, `{`} {
		status, b := post("/jobs", bad)
		assert.Equal(t, http.StatusBadRequest, status, "submit %s: %d %s, want 400", bad, status, b)
	}
	status, b := post("/jobs", `{"task": "`+r.task+`"}`)
	var st jobs.Status
	require.Falsef(t, status != http.StatusCreated || json.Unmarshal(b, &st) != nil || st.State != jobs.Queued, "submit: %d %s", status, b)
	done := waitFor(t, m, st.ID, "finished", func(s jobs.Status) bool { return s.State != jobs.Queued && s.State != jobs.Running })
	require.Falsef(t, done.State != jobs.Done || done.Step != 3 || done.Calls == 0, "finished job: %+v", done)
	raw, err := os.ReadFile(filepath.Join(m.Out(st.ID), "results.json"))
	require.NoError(t, err, "no results")
	var res search.Results
	require.NoError(t, json.Unmarshal(raw, &res))
	// The status's floored share is the search's own count, as results.json
	// has it.
	assert.Falsef(t, res.Lookups == 0 || math.Abs(done.FlooredShare-float64(res.Floored)/float64(res.Lookups)) > 1e-12, "floored share %v, want %d of %d look-ups", done.FlooredShare, res.Floored, res.Lookups)
	resp, err := http.Get(api.URL + "/jobs/" + st.ID)
	assert.Falsef(t, err != nil || resp.StatusCode != http.StatusOK, "GET job: %v %v", err, resp.Status)
	resp.Body.Close()
	resp, _ = http.Get(api.URL + "/jobs/job-unknown")
	assert.Equal(t, http.StatusNotFound, resp.StatusCode, "unknown job: %d, want 404", resp.StatusCode)
	resp.Body.Close()
	status, _ = post("/jobs/job-unknown/cancel", "")
	assert.Equal(t, http.StatusNotFound, status, "cancel unknown: %d, want 404", status)
}

// TestJobResumesAfterRestart closes the manager while a job runs; a new
// manager on the same directory resumes it from its checkpoint and
// finishes it.
func TestJobResumesAfterRestart(t *testing.T) {
	r := newRig(t, 8)
	dir := t.TempDir()
	m, err := jobs.Open(dir, r.model, jobs.Options{Proxy: r.api, CheckpointEvery: 1})
	require.NoError(t, err)
	st, err := m.Submit(jobs.Spec{Task: r.task})
	require.NoError(t, err)
	waitFor(t, m, st.ID, "reached step 2", func(s jobs.Status) bool { return s.Step >= 2 })
	m.Close()
	got, _ := m.Get(st.ID)
	require.Equal(t, jobs.Running, got.State, "after close the job is %q, want it left running to resume", got.State)
	// The step the job goes on from is its checkpoint's, whatever step
	// the status last showed.
	f, err := os.Open(filepath.Join(m.Out(st.ID), search.CheckpointFile))
	require.NoError(t, err)
	ckpt, err := search.ReadState(f, "reading-corner", 7) // the example task's name and seed
	f.Close()
	require.NoError(t, err)

	m2, err := jobs.Open(dir, r.model, jobs.Options{Proxy: r.api, CheckpointEvery: 1})
	require.NoError(t, err)
	defer m2.Close()
	done := waitFor(t, m2, st.ID, "finished", func(s jobs.Status) bool { return s.State != jobs.Queued && s.State != jobs.Running })
	assert.Falsef(t, done.State != jobs.Done || done.Step != 8 || done.Resumed != ckpt.Step, "resumed job: %+v, want done at step 8, resumed after step %d (the checkpoint's)", done, ckpt.Step)
	// The best prompt so far is the greedy prompt with the highest dev
	// accuracy in the whole curve, the part before the restart included.
	h, err := m2.History(st.ID)
	require.NoError(t, err)
	want := search.BestByDev(h.Points)
	assert.Falsef(t, want.Step == 0 || done.BestPrompt != want.Prompt || done.BestStep != want.Step || math.Abs(done.DevAcc-want.DevAcc) > 1e-6, "best so far: %q at step %d (dev %v), want %q at step %d (dev %v) from the history", done.BestPrompt, done.BestStep, done.DevAcc, want.Prompt, want.Step, want.DevAcc)
	last := h.Points[len(h.Points)-1]
	assert.Falsef(t, done.LatestPrompt != last.Prompt || math.Abs(done.LatestDevAcc-last.DevAcc) > 1e-6, "latest: %q (dev %v), want the last step's %q (dev %v)", done.LatestPrompt, done.LatestDevAcc, last.Prompt, last.DevAcc)
}

func TestCancelStopsAJob(t *testing.T) {
	r := newRig(t, 200)
	m, err := jobs.Open(t.TempDir(), r.model, jobs.Options{Proxy: r.api})
	require.NoError(t, err)
	defer m.Close()
	st, err := m.Submit(jobs.Spec{Task: r.task, OverCap: true})
	require.NoError(t, err)
	waitFor(t, m, st.ID, "started", func(s jobs.Status) bool { return s.Step >= 1 })
	_, err = m.Cancel(st.ID)
	require.NoError(t, err)
	got := waitFor(t, m, st.ID, "stopped", func(s jobs.Status) bool { return s.State == jobs.Canceled })
	assert.Falsef(t, got.Step >= 200, "canceled job ran to the end: %+v", got)
}
