package jobs_test

import (
	"encoding/json"
	"math"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/jobs"
	"github.com/stintlab/stint/searcher/search"
)

// getHistory asks the API for job id's history.
func getHistory(t *testing.T, api, id string) (int, jobs.History, string) {
	t.Helper()
	resp, err := http.Get(api + "/jobs/" + id + "/history")
	require.NoError(t, err)
	defer resp.Body.Close()
	var raw json.RawMessage
	require.NoError(t, json.NewDecoder(resp.Body).Decode(&raw))
	var h jobs.History
	_ = json.Unmarshal(raw, &h)
	return resp.StatusCode, h, string(raw)
}

// TestHistoryServesTheCurveAJobWrote runs a real three-step search, then
// reads its curve back over the API: from history.csv once it is done, from
// the checkpoint when history.csv is not there (as while it runs), and a
// clear error naming the line and field when the file is damaged.
func TestHistoryServesTheCurveAJobWrote(t *testing.T) {
	r := newRig(t, 3)
	m, err := jobs.Open(t.TempDir(), r.model, jobs.Options{Proxy: r.api, CheckpointEvery: 1})
	require.NoError(t, err)
	defer m.Close()
	api := httptest.NewServer(m.Handler())
	defer api.Close()
	st, err := m.Submit(jobs.Spec{Task: r.task})
	require.NoError(t, err)
	status, h, raw := getHistory(t, api.URL, st.ID)
	assert.Falsef(t, status != http.StatusOK || h.ID != st.ID || h.Points == nil, "history of a queued job: %d %s, want 200 with a list (empty or not)", status, raw)
	done := waitFor(t, m, st.ID, "finished", func(s jobs.Status) bool { return s.State != jobs.Queued && s.State != jobs.Running })
	require.Equal(t, jobs.Done, done.State, "job: %+v", done)

	status, fromCSV, raw := getHistory(t, api.URL, st.ID)
	require.Falsef(t, status != http.StatusOK || fromCSV.Source != "history.csv" || len(fromCSV.Points) != 3, "history of a finished job: %d %s, want 3 points from history.csv", status, raw)
	for i, p := range fromCSV.Points {
		assert.Falsef(t, p.Step != i+1 || p.TrainAcc < 0 || p.TrainAcc > 1, "point %d: %+v, want step %d and an accuracy in [0, 1]", i, p, i+1)
	}
	csvPath := filepath.Join(m.Out(st.ID), "history.csv")
	src, err := os.ReadFile(csvPath)
	require.NoError(t, err)
	want := strings.Count(string(src), "\n") - 1
	assert.Equal(t, len(fromCSV.Points), want, "history.csv has %d lines of points, the API gave %d", want, len(fromCSV.Points))

	require.NoError(t, os.Remove(csvPath))
	status, fromCkpt, raw := getHistory(t, api.URL, st.ID)
	require.Falsef(t, status != http.StatusOK || fromCkpt.Source != search.CheckpointFile || len(fromCkpt.Points) != len(fromCSV.Points), "history from the checkpoint: %d %s, want the same %d points", status, raw, len(fromCSV.Points))
	for i := range fromCkpt.Points {
		a, b := fromCkpt.Points[i], fromCSV.Points[i]
		// history.csv keeps 8 significant digits.
		assert.Falsef(t, a.Step != b.Step || !near(a.TrainAcc, b.TrainAcc) || !near(a.MeanReward, b.MeanReward) || !near(a.DevAcc, b.DevAcc), "step %d: checkpoint %+v, history.csv %+v", a.Step, a, b)
	}

	broken := "step,mean_reward,train_accuracy,dev_accuracy,loss,greedy_prompt\n1,0.5,0.25,,0.1,a b\n2,0.5,lots,,0.1,a b\n"
	require.NoError(t, os.WriteFile(csvPath, []byte(broken), 0o600))
	status, _, raw = getHistory(t, api.URL, st.ID)
	assert.Falsef(t, status != http.StatusInternalServerError || !strings.Contains(raw, "line 3") || !strings.Contains(raw, "train_accuracy"), "damaged history.csv: %d %s, want 500 naming line 3 and train_accuracy", status, raw)
	status, _, _ = getHistory(t, api.URL, "job-unknown")
	assert.Equal(t, http.StatusNotFound, status, "history of an unknown job: %d, want 404", status)
}

func near(a, b float64) bool { return math.Abs(a-b) <= 1e-6*math.Max(1, math.Abs(b)) }
