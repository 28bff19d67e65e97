package proxy_test

import (
	"bytes"
	"fmt"
	"net/http"
	"path/filepath"
	"slices"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
)

// newRunRig is a rig with a run journal on its own bbolt file and two
// teams, lab (whose key the rig sends) and kiln.
func newRunRig(t *testing.T) *rig {
	t.Helper()
	r, _ := newRunRigDB(t)
	return r
}

// newBoltJournal opens a run journal in a fresh bbolt file, closed when
// the test ends.
func newBoltJournal(t *testing.T) (*bbolt.DB, *runs.BoltJournal) {
	t.Helper()
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "runs.db"), 0o600, nil)
	require.NoError(t, err)
	t.Cleanup(func() { _ = db.Close() })
	j, err := runs.NewBolt(db, runs.BoltOptions{})
	require.NoError(t, err)
	return db, j
}

// newRunRigDB is newRunRig that also returns the journal's bbolt file.
func newRunRigDB(t *testing.T) (*rig, *bbolt.DB) {
	t.Helper()
	db, j := newBoltJournal(t)
	r := newRig(t, withTeams(teamWithKey("lab", "lab-key"), teamWithKey("kiln", "kiln-key")), func(o *proxy.Options) { o.Runs = j })
	r.key = "lab-key"
	return r, db
}

// runCall is one call of a scripted run.
type runCall struct {
	chat bool
	body map[string]any
}

func (c runCall) send(r *rig, headers ...string) response {
	r.t.Helper()
	if c.chat {
		return r.chat(c.body, headers...)
	}
	return r.complete(c.body, headers...)
}

func sampled(prompt string, extra ...any) map[string]any {
	b := greedy(prompt, extra...)
	b["temperature"] = 0.9
	return b
}

// script is a run mixing greedy and sampled calls, repeats, a batch, chat
// and streams.
func script() []runCall {
	chat := func(text string, temp float64, stream bool) runCall {
		return runCall{chat: true, body: map[string]any{"model": model, "temperature": temp, "max_tokens": 6, "stream": stream,
			"messages": []map[string]string{{"role": "user", "content": text}}}}
	}
	return []runCall{
		{body: greedy("the orchard ledger opens", "max_tokens", 6)},
		{body: sampled("name a pear variety", "max_tokens", 6)},
		{body: sampled("name a pear variety", "max_tokens", 6)},     // a repeat: its own sample
		{body: greedy("the orchard ledger opens", "max_tokens", 6)}, // a hit while recording
		{body: sampled("name a pear variety", "max_tokens", 6, "stream", true)},
		{body: greedy([]string{"crate one", "crate two", "crate three"}, "max_tokens", 4)},
		chat("pick a harvest day", 0.9, false),
		chat("pick a harvest day", 0, true),
		{body: sampled("name a pear variety", "max_tokens", 6)},
	}
}

func TestRunReplaysBitForBitWithoutUpstream(t *testing.T) {
	r := newRunRig(t)
	var recorded [][]byte
	for i, c := range script() {
		got := c.send(r, proxy.HeaderRun, "orchard-7")
		require.Equal(t, http.StatusOK, got.status, "call %d: %d %s", i, got.status, got.body)
		recorded = append(recorded, got.body)
	}
	require.False(t, bytes.Equal(recorded[1], recorded[2]), "two sampled calls gave the same answer: the test would not tell their replays apart")
	calls := r.up.Calls()
	for round := range 2 { // a second replay in the same session wraps around to the first answers
		for i, c := range script() {
			got := c.send(r, proxy.HeaderRun, "orchard-7", proxy.HeaderRunMode, "replay")
			require.Equal(t, http.StatusOK, got.status, "round %d replay %d: %d %q %s", round, i, got.status, got.cache(), got.body)
			require.Equal(t, proxy.OutcomeReplay, got.cache(), "round %d replay %d: %d %q %s", round, i, got.status, got.cache(), got.body)
			assert.True(t, bytes.Equal(got.body, recorded[i]), "round %d replay %d differs:\n got %s\nwant %s", round, i, got.body, recorded[i])
		}
	}
	assert.True(t, r.up.Calls() == calls, "upstream calls went from %+v to %+v during replay; want none", calls, r.up.Calls())
}

// TestReplayCarriesTheRecordedCost: a replayed answer costs nothing
// (Stint-Cost-Usd 0) and says what the call was charged when it was
// recorded, so a client that totals a run's spend gets the same figure
// from the recording and its replay.
func TestReplayCarriesTheRecordedCost(t *testing.T) {
	_, j := newBoltJournal(t)
	r := newSpendRigWith(t, guard.TeamPolicy{}, func(o *proxy.Options) { o.Runs = j })
	calls := []map[string]any{greedy("the cost of a bushel"), greedy("the cost of a bushel"), greedy([]string{"crate one", "crate two"})}
	var charged, saved []int64
	for i, body := range calls {
		got := r.complete(body, proxy.HeaderRun, "ledger-1")
		require.Equal(t, http.StatusOK, got.status, "call %d: %d %s", i, got.status, got.body)
		charged = append(charged, headerNanos(t, got.header, proxy.HeaderCost))
		saved = append(saved, headerNanos(t, got.header, proxy.HeaderSaved))
	}
	require.NotEqual(t, int64(0), charged[0], "recorded charges %v, savings %v: want a miss that costs and a hit that does not but saves", charged, saved)
	require.Equal(t, int64(0), charged[1], "recorded charges %v, savings %v: want a miss that costs and a hit that does not but saves", charged, saved)
	require.NotEqual(t, int64(0), saved[1], "recorded charges %v, savings %v: want a miss that costs and a hit that does not but saves", charged, saved)
	for i, body := range calls {
		got := r.complete(body, proxy.HeaderRun, "ledger-1", proxy.HeaderRunMode, "replay")
		require.Equal(t, http.StatusOK, got.status, "replay %d: %d %q", i, got.status, got.cache())
		require.Equal(t, proxy.OutcomeReplay, got.cache(), "replay %d: %d %q", i, got.status, got.cache())
		c := headerNanos(t, got.header, proxy.HeaderCost)
		assert.Equal(t, int64(0), c, "replay %d charged %d nanos, want 0", i, c)
		rec := headerNanos(t, got.header, proxy.HeaderRecordedCost)
		assert.Equal(t, charged[i], rec, "replay %d: %s %d nanos, want the recorded charge %d", i, proxy.HeaderRecordedCost, rec, charged[i])
		rec = headerNanos(t, got.header, proxy.HeaderRecordedSaved)
		assert.Equal(t, saved[i], rec, "replay %d: %s %d nanos, want the recorded saving %d", i, proxy.HeaderRecordedSaved, rec, saved[i])
	}
}

func TestReplayRefusals(t *testing.T) {
	r := newRunRig(t)
	got := r.complete(greedy("the cider press starts", "max_tokens", 4), proxy.HeaderRun, "press-1")
	require.Equal(t, 200, got.status, "record: %d %s", got.status, got.body)
	calls := r.up.Calls()
	tests := []struct {
		name    string
		body    map[string]any
		headers []string
		status  int
		code    string
	}{
		{"a call the run never made", greedy("another prompt", "max_tokens", 4),
			[]string{proxy.HeaderRun, "press-1", proxy.HeaderRunMode, "replay"}, http.StatusConflict, "replay_miss"},
		{"the same call, streamed", greedy("the cider press starts", "max_tokens", 4, "stream", true),
			[]string{proxy.HeaderRun, "press-1", proxy.HeaderRunMode, "replay"}, http.StatusConflict, "replay_miss"},
		{"a run that does not exist", greedy("the cider press starts", "max_tokens", 4),
			[]string{proxy.HeaderRun, "press-2", proxy.HeaderRunMode, "replay"}, http.StatusNotFound, "run_not_found"},
		{"another team's run", greedy("the cider press starts", "max_tokens", 4),
			[]string{proxy.HeaderRun, "press-1", proxy.HeaderRunMode, "replay", "Authorization", "Bearer kiln-key"}, http.StatusNotFound, "run_not_found"},
		{"a bad run id", greedy("the cider press starts", "max_tokens", 4),
			[]string{proxy.HeaderRun, "press 1/../x"}, http.StatusBadRequest, "invalid_value"},
		{"an unknown mode", greedy("the cider press starts", "max_tokens", 4),
			[]string{proxy.HeaderRun, "press-1", proxy.HeaderRunMode, "rewind"}, http.StatusBadRequest, "invalid_value"},
		{"a mode without a run", greedy("the cider press starts", "max_tokens", 4),
			[]string{proxy.HeaderRunMode, "replay"}, http.StatusBadRequest, "invalid_value"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := r.complete(tt.body, tt.headers...)
			assert.Equal(t, tt.status, got.status, "%d %s, want %d %s", got.status, got.body, tt.status, tt.code)
			assert.Equal(t, tt.code, errorCode(t, got.body), "%d %s, want %d %s", got.status, got.body, tt.status, tt.code)
		})
	}
	assert.True(t, r.up.Calls() == calls, "refused replays reached the upstream: %+v → %+v", calls, r.up.Calls())
}

// TestConcurrentRunReplays records 12 identical sampled calls at once and
// 8 distinct ones, then replays them all at once in another order: the
// identical calls get the recorded answers, each once (any assignment is a
// valid replay of interchangeable requests), and each distinct call its
// own answer.
func TestConcurrentRunReplays(t *testing.T) {
	r := newRunRig(t)
	const same, distinct = 12, 8
	bodies := make([]map[string]any, 0, same+distinct)
	for range same {
		bodies = append(bodies, sampled("a name for the new orchard", "max_tokens", 5))
	}
	for i := range distinct {
		bodies = append(bodies, sampled(fmt.Sprintf("a name for orchard row %d", i), "max_tokens", 5))
	}
	sendAll := func(order []int, headers ...string) [][]byte {
		out := make([][]byte, len(bodies))
		var wg sync.WaitGroup
		for _, i := range order {
			wg.Go(func() {
				got := r.complete(bodies[i], headers...)
				assert.Equal(t, http.StatusOK, got.status, "call %d: %d %s", i, got.status, got.body)
				out[i] = got.body
			})
		}
		wg.Wait()
		return out
	}
	order := make([]int, len(bodies))
	for i := range order {
		order[i] = i
	}
	rec := sendAll(order, proxy.HeaderRun, "rows")
	calls := r.up.Calls()
	slices.Reverse(order)
	rep := sendAll(order, proxy.HeaderRun, "rows", proxy.HeaderRunMode, "replay", proxy.HeaderReplaySession, "audit")
	sortedStrings := func(bs [][]byte) []string {
		s := make([]string, len(bs))
		for i, b := range bs {
			s[i] = string(b)
		}
		slices.Sort(s)
		return s
	}
	assert.True(t, slices.Equal(sortedStrings(rep[:same]), sortedStrings(rec[:same])), "the replayed identical calls are not the recorded answers, each once")
	for i := same; i < len(bodies); i++ {
		assert.True(t, bytes.Equal(rep[i], rec[i]), "distinct call %d replayed another answer", i)
	}
	assert.True(t, r.up.Calls() == calls, "replay reached the upstream: %+v → %+v", calls, r.up.Calls())
}

// TestUnrecordedAnswerIsNotAcknowledged breaks the journal (its file is
// closed): a recorded call's plain answer turns into a 503 instead of an
// answer the run could not replay, and a streamed one ends without its
// final event.
func TestUnrecordedAnswerIsNotAcknowledged(t *testing.T) {
	r, db := newRunRigDB(t)
	require.NoError(t, db.Close())
	got := r.complete(greedy("the orchard ledger opens", "max_tokens", 6), proxy.HeaderRun, "broken")
	assert.Equal(t, http.StatusServiceUnavailable, got.status, "plain answer with the journal down: %d %s, want 503 run_journal_unavailable", got.status, got.body)
	assert.Equal(t, "run_journal_unavailable", errorCode(t, got.body), "plain answer with the journal down: %d %s, want 503 run_journal_unavailable", got.status, got.body)
	got = r.complete(greedy("the orchard ledger opens", "max_tokens", 6, "stream", true), proxy.HeaderRun, "broken")
	assert.False(t, bytes.Contains(got.body, []byte("[DONE]")), "stream with the journal down ended normally:\n%s", got.body)
	// Without a run header the same proxy answers as usual.
	got = r.complete(greedy("the orchard ledger opens", "max_tokens", 6))
	assert.Equal(t, http.StatusOK, got.status, "unrecorded call: %d %s", got.status, got.body)
}
