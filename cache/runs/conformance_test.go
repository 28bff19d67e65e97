package runs_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/runs"
)

// TestConformance runs the same suite on every backend: bbolt on a file, a
// standalone redis-server, and a three-master Redis Cluster.
func TestConformance(t *testing.T) {
	t.Parallel()
	for _, mk := range []func(testing.TB) backend{
		func(testing.TB) backend { return boltBackend() }, redisBackend, clusterBackend,
	} {
		b := mk(t)
		t.Run(b.name, func(t *testing.T) {
			t.Parallel()
			runSuite(t, b)
		})
	}
}

func runSuite(t *testing.T, b backend) {
	tests := []struct {
		name string
		fn   func(t *testing.T, j runs.Journal)
	}{
		{"RecordLookup", testRecordLookup},
		{"Misses", testMisses},
		{"TeamIsolation", testTeamIsolation},
		{"SummaryList", testSummaryList},
		{"Entries", testEntries},
		{"Delete", testDelete},
		{"Concurrent", testConcurrent},
		{"Invalid", testInvalid},
		{"ExportImport", testExportImport},
		{"ContextDone", testContextDone},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			tc.fn(t, b.open(t))
		})
	}
}

func testRecordLookup(t *testing.T, j runs.Journal) {
	calls := mixedCalls(60)
	got := recordAll(t, j, "lab", "sweep-1", calls)
	occ := map[string]int64{}
	for i, e := range got {
		occ[calls[i].key]++
		assert.Equal(t, int64(i+1), e.Seq, "Record call %d: seq", i)
		assert.Equal(t, occ[calls[i].key], e.Occurrence, "Record call %d: occurrence", i)
		assert.Equal(t, refOf(calls[i].answer.Body), e.Ref, "Record call %d: ref", i)
	}
	checkReplay(t, j, "lab", "sweep-1", calls)
	for key, n := range occ {
		c, err := j.Count(context.Background(), "lab", "sweep-1", key)
		assert.NoError(t, err, "Count(%.8s)", key)
		assert.Equal(t, n, c, "Count(%.8s)", key)
	}
	// A zero Time is filled in; Stream follows the answer.
	e, err := j.Record(context.Background(), "lab", "sweep-1", runs.Entry{Key: keyOf("zero-time"), Stream: true}, jsonAnswer("x"))
	require.NoError(t, err)
	assert.False(t, e.Time.IsZero(), "Record with zero Time: a set Time")
	assert.False(t, e.Stream, "Record with Stream on a plain answer: Stream false")
}

func testMisses(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(12)
	recordAll(t, j, "lab", "r1", calls)
	tests := []struct {
		name     string
		run, key string
		occ      int64
		wantMiss bool
		wantHave int64
	}{
		{"unknown key", "r1", keyOf("never asked"), 1, true, 0},
		{"one past the recorded", "r1", keyOf("sampled-0"), 3, true, 2},
		{"far past", "r1", keyOf("greedy"), 99, true, 2},
		{"occurrence zero", "r1", keyOf("greedy"), 0, true, 2},
		{"unknown run", "r2", keyOf("greedy"), 1, false, 0},
	}
	for _, tc := range tests {
		_, _, err := j.Lookup(ctx, "lab", tc.run, tc.key, tc.occ)
		wantNotFound(t, tc.name, err)
		var miss *runs.MissError
		if !assert.Equal(t, tc.wantMiss, errors.As(err, &miss), "%s: errors.As MissError (err %v)", tc.name, err) {
			continue
		}
		if tc.wantMiss {
			assert.Equal(t, runs.MissError{Run: tc.run, Key: tc.key, Occurrence: tc.occ, Have: tc.wantHave}, *miss, "%s", tc.name)
		}
	}
	n, err := j.Count(ctx, "lab", "r2", keyOf("greedy"))
	assert.NoError(t, err, "Count on an unknown run")
	assert.Zero(t, n, "Count on an unknown run")
}

func testTeamIsolation(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(12)
	recordAll(t, j, "team-a", "shared-name", calls)
	key := calls[0].key
	// Team names that a careless key scheme could confuse with team-a's.
	for _, other := range []string{"team-b", "team-a/shared-name", "team-", "team-a}", "{team-a}"} {
		_, _, err := j.Lookup(ctx, other, "shared-name", key, 1)
		assert.ErrorIs(t, err, runs.ErrNotFound, "team %q Lookup", other)
		var miss *runs.MissError
		assert.False(t, errors.As(err, &miss), "team %q Lookup: %v tells that the run exists", other, err)
		n, err := j.Count(ctx, other, "shared-name", key)
		assert.NoError(t, err, "team %q Count", other)
		assert.Zero(t, n, "team %q Count", other)
		_, err = j.Summary(ctx, other, "shared-name")
		wantNotFound(t, "team "+other+" Summary", err)
		list, err := j.List(ctx, other)
		assert.NoError(t, err, "team %q List", other)
		assert.Empty(t, list, "team %q List", other)
		wantNotFound(t, "team "+other+" Delete", j.Delete(ctx, other, "shared-name"))
		wantNotFound(t, "team "+other+" Export", j.Export(ctx, other, "shared-name", &bytes.Buffer{}))
		wantNotFound(t, "team "+other+" Entries", j.Entries(ctx, other, "shared-name", func(runs.Entry) error { return nil }))
	}
	// Team B's own run of the same name is separate.
	recordAll(t, j, "team-b", "shared-name", calls[:3])
	checkReplay(t, j, "team-a", "shared-name", calls)
	checkReplay(t, j, "team-b", "shared-name", calls[:3])
	s, err := j.Summary(ctx, "team-a", "shared-name")
	require.NoError(t, err, "team-a Summary after team-b's attempts")
	assert.True(t, sameSummary(s, wantSummary("team-a", "shared-name", calls)), "team-a Summary after team-b's attempts: %+v", s)
}

func testSummaryList(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	sets := []struct {
		run   string
		calls []call
		shift time.Duration
	}{
		{"oldest", mixedCalls(7), 0},
		{"newest", mixedCalls(13), 2 * time.Hour},
		{"middle.b", mixedCalls(5), time.Hour},
		{"middle.a", mixedCalls(5), time.Hour}, // same Last as middle.b: ordered by id
	}
	for _, s := range sets {
		for i := range s.calls {
			s.calls[i].entry.Time = s.calls[i].entry.Time.Add(s.shift)
		}
		recordAll(t, j, "lab", s.run, s.calls)
	}
	for _, s := range sets {
		got, err := j.Summary(ctx, "lab", s.run)
		require.NoError(t, err, "Summary(%s)", s.run)
		want := wantSummary("lab", s.run, s.calls)
		assert.True(t, sameSummary(got, want), "Summary(%s):\n got %+v\nwant %+v", s.run, got, want)
	}
	list, err := j.List(ctx, "lab")
	require.NoError(t, err)
	var ids []string
	for _, s := range list {
		ids = append(ids, s.Run)
	}
	assert.Equal(t, []string{"newest", "middle.a", "middle.b", "oldest"}, ids, "List order")
	for _, s := range list {
		assert.Equal(t, "lab", s.Team, "List entry %+v", s)
		assert.NotZero(t, s.Calls, "List entry %+v", s)
	}
}

func testEntries(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(30)
	want := recordAll(t, j, "lab", "r", calls)
	var got []runs.Entry
	// fn runs outside any transaction: it may record into the same run,
	// and those later entries are not part of this iteration.
	err := j.Entries(ctx, "lab", "r", func(e runs.Entry) error {
		got = append(got, e)
		if e.Seq == 1 {
			_, err := j.Record(ctx, "lab", "r", calls[0].entry, calls[0].answer)
			return err
		}
		return nil
	})
	require.NoError(t, err)
	require.Len(t, got, len(want), "Entries")
	for i := range want {
		assert.True(t, sameEntry(got[i], want[i]), "entry %d:\n got %+v\nwant %+v", i, got[i], want[i])
	}
	stop := errors.New("stop")
	n := 0
	err = j.Entries(ctx, "lab", "r", func(runs.Entry) error {
		n++
		if n == 5 {
			return stop
		}
		return nil
	})
	assert.ErrorIs(t, err, stop, "Entries with fn failing at 5")
	assert.Equal(t, 5, n, "Entries with fn failing at 5: calls")
}

func testDelete(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(18)
	recordAll(t, j, "lab", "gone", calls)
	recordAll(t, j, "lab", "kept", calls[:4])
	require.NoError(t, j.Delete(ctx, "lab", "gone"))
	for _, c := range calls {
		_, _, err := j.Lookup(ctx, "lab", "gone", c.key, 1)
		wantNotFound(t, "Lookup after Delete", err)
		n, err := j.Count(ctx, "lab", "gone", c.key)
		assert.NoError(t, err, "Count after Delete")
		assert.Zero(t, n, "Count after Delete")
	}
	_, err := j.Summary(ctx, "lab", "gone")
	wantNotFound(t, "Summary after Delete", err)
	wantNotFound(t, "second Delete", j.Delete(ctx, "lab", "gone"))
	wantNotFound(t, "Export after Delete", j.Export(ctx, "lab", "gone", &bytes.Buffer{}))
	list, err := j.List(ctx, "lab")
	require.NoError(t, err, "List after Delete")
	if assert.Len(t, list, 1, "List after Delete: only kept") {
		assert.Equal(t, "kept", list[0].Run, "List after Delete")
	}
	checkReplay(t, j, "lab", "kept", calls[:4])
	// The id can be used again, from scratch.
	recordAll(t, j, "lab", "gone", calls[5:7])
	checkReplay(t, j, "lab", "gone", calls[5:7])
	s, err := j.Summary(ctx, "lab", "gone")
	require.NoError(t, err, "Summary of the re-recorded run")
	assert.True(t, sameSummary(s, wantSummary("lab", "gone", calls[5:7])), "Summary of the re-recorded run: %+v", s)
}

func testConcurrent(t *testing.T, j runs.Journal) {
	const workers, each, keys = 32, 8, 5
	ctx := context.Background()
	type result struct {
		e    runs.Entry
		body string
	}
	results := make([][]result, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Go(func() {
			for i := range each {
				body := fmt.Sprintf(`{"worker":%d,"call":%d}`, w, i)
				e, err := j.Record(ctx, "lab", "busy", runs.Entry{Key: keyOf(fmt.Sprint((w + i) % keys)), Time: base},
					runs.Answer{Status: 200, ContentType: "application/json", Body: []byte(body)})
				if !assert.NoError(t, err) {
					return
				}
				results[w] = append(results[w], result{e, body})
			}
		})
	}
	wg.Wait()
	var seqs []int64
	occ := map[string][]int64{}
	for _, rs := range results {
		for _, r := range rs {
			seqs = append(seqs, r.e.Seq)
			occ[r.e.Key] = append(occ[r.e.Key], r.e.Occurrence)
			// Each (key, occurrence) leads to the body that was recorded
			// with it, not to another worker's.
			_, a, err := j.Lookup(ctx, "lab", "busy", r.e.Key, r.e.Occurrence)
			assert.NoError(t, err, "Lookup(%.8s, %d)", r.e.Key, r.e.Occurrence)
			assert.Equal(t, r.body, string(a.Body), "Lookup(%.8s, %d)", r.e.Key, r.e.Occurrence)
		}
	}
	slices.Sort(seqs)
	for i, s := range seqs {
		require.Equal(t, int64(i+1), s, "Seqs are not a permutation of 1..%d: sorted %v", workers*each, seqs)
	}
	for key, os := range occ {
		slices.Sort(os)
		for i, o := range os {
			require.Equal(t, int64(i+1), o, "occurrences of %.8s are not 1..%d: %v", key, len(os), os)
		}
	}
	s, err := j.Summary(ctx, "lab", "busy")
	require.NoError(t, err, "Summary")
	assert.EqualValues(t, workers*each, s.Calls, "Summary: calls")
	assert.EqualValues(t, keys, s.Keys, "Summary: keys")
	assert.EqualValues(t, workers*each, s.Bodies, "Summary: bodies")
}

func testInvalid(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	ok := runs.Entry{Key: keyOf("k"), Time: base}
	okAnswer := jsonAnswer("x")
	tests := []struct {
		name  string
		team  string
		run   string
		entry runs.Entry
		ans   runs.Answer
	}{
		{"empty team", "", "r", ok, okAnswer},
		{"long team", strings.Repeat("t", runs.MaxTeamLen+1), "r", ok, okAnswer},
		{"empty run", "lab", "", ok, okAnswer},
		{"run with slash", "lab", "a/b", ok, okAnswer},
		{"run with brace", "lab", "a}b", ok, okAnswer},
		{"long run", "lab", strings.Repeat("r", runs.MaxIDLen+1), ok, okAnswer},
		{"empty key", "lab", "r", runs.Entry{Time: base}, okAnswer},
		{"long key", "lab", "r", runs.Entry{Key: strings.Repeat("k", runs.MaxKeyLen+1), Time: base}, okAnswer},
		{"key not UTF-8", "lab", "r", runs.Entry{Key: "\xff\xfe", Time: base}, okAnswer},
		{"long model", "lab", "r", runs.Entry{Key: "k", Model: strings.Repeat("m", runs.MaxLabelLen+1), Time: base}, okAnswer},
		{"no status", "lab", "r", ok, runs.Answer{Body: []byte("{}")}},
		{"time past 2262", "lab", "r", runs.Entry{Key: "k", Time: time.Date(2300, 1, 1, 0, 0, 0, 0, time.UTC)}, okAnswer},
		{"body too large", "lab", "r", ok, runs.Answer{Status: 200, Body: make([]byte, runs.MaxBodyBytes+1)}},
	}
	for _, tc := range tests {
		_, err := j.Record(ctx, tc.team, tc.run, tc.entry, tc.ans)
		assert.ErrorIs(t, err, runs.ErrInvalid, "Record with %s: got", tc.name)
	}
	list, err := j.List(ctx, "lab")
	require.NoError(t, err, "List")
	assert.Empty(t, list, "refused Records left runs behind")
	_, _, err = j.Lookup(ctx, "lab", "bad id!", "k", 1)
	assert.ErrorIs(t, err, runs.ErrInvalid, "Lookup with a bad id")
}

func testExportImport(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(24)
	recordAll(t, j, "lab", "orig", calls)
	var archive bytes.Buffer
	require.NoError(t, j.Export(ctx, "lab", "orig", &archive))
	// Import under another team keeps the id; As renames; an existing id
	// is refused unless Replace.
	tests := []struct {
		name    string
		team    string
		opts    runs.ImportOptions
		wantRun string
		wantErr error
	}{
		{"other team", "lab2", runs.ImportOptions{}, "orig", nil},
		{"same team, existing id", "lab", runs.ImportOptions{}, "", runs.ErrExists},
		{"same team, renamed", "lab", runs.ImportOptions{As: "copy"}, "copy", nil},
		{"renamed onto the copy", "lab", runs.ImportOptions{As: "copy"}, "", runs.ErrExists},
		{"replace", "lab", runs.ImportOptions{As: "copy", Replace: true}, "copy", nil},
		{"bad As", "lab", runs.ImportOptions{As: "no spaces"}, "", runs.ErrInvalid},
	}
	for _, tc := range tests {
		s, err := j.Import(ctx, tc.team, bytes.NewReader(archive.Bytes()), tc.opts)
		if !assert.ErrorIs(t, err, tc.wantErr, "%s", tc.name) {
			continue
		}
		if err != nil {
			continue
		}
		want := wantSummary(tc.team, tc.wantRun, calls)
		assert.True(t, sameSummary(s, want), "%s: Import returned %+v, want %+v", tc.name, s, want)
		checkReplay(t, j, tc.team, tc.wantRun, calls)
	}
	// Replace swaps the whole run: a longer run replaced by a shorter one
	// keeps nothing of the longer.
	recordAll(t, j, "lab", "long", mixedCalls(40))
	_, err := j.Import(ctx, "lab", bytes.NewReader(archive.Bytes()), runs.ImportOptions{As: "long", Replace: true})
	require.NoError(t, err)
	checkReplay(t, j, "lab", "long", calls)
	_, _, err = j.Lookup(ctx, "lab", "long", keyOf("unique-35"), 1)
	assert.ErrorIs(t, err, runs.ErrNotFound, "Lookup of a call only the replaced run had")
	sum, err := j.Summary(ctx, "lab", "long")
	require.NoError(t, err, "Summary after Replace")
	assert.True(t, sameSummary(sum, wantSummary("lab", "long", calls)), "Summary after Replace: %+v", sum)
	// The imported run records on from where the archive ended.
	e, err := j.Record(ctx, "lab2", "orig", calls[0].entry, calls[0].answer)
	require.NoError(t, err, "Record after Import")
	assert.Equal(t, int64(len(calls)+1), e.Seq, "Record after Import: seq")
	assert.EqualValues(t, 5, e.Occurrence, "Record after Import: occurrence")
}

func testContextDone(t *testing.T, j runs.Journal) {
	recordAll(t, j, "lab", "r", mixedCalls(3))
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	c := mixedCalls(1)[0]
	checks := []struct {
		name string
		err  error
	}{
		{"Record", func() error { _, err := j.Record(ctx, "lab", "r", c.entry, c.answer); return err }()},
		{"Lookup", func() error { _, _, err := j.Lookup(ctx, "lab", "r", c.key, 1); return err }()},
		{"Summary", func() error { _, err := j.Summary(ctx, "lab", "r"); return err }()},
		{"List", func() error { _, err := j.List(ctx, "lab"); return err }()},
		{"Export", j.Export(ctx, "lab", "r", &bytes.Buffer{})},
		{"Import", func() error {
			var archive bytes.Buffer
			if err := j.Export(context.Background(), "lab", "r", &archive); err != nil {
				return err
			}
			_, err := j.Import(ctx, "lab", &archive, runs.ImportOptions{As: "copy"})
			return err
		}()},
	}
	for _, ch := range checks {
		assert.ErrorIs(t, ch.err, context.Canceled, "%s with a cancelled context", ch.name)
	}
	s, err := j.Summary(context.Background(), "lab", "r")
	require.NoError(t, err, "Summary")
	assert.EqualValues(t, 3, s.Calls, "Summary: the 3 calls recorded before")
	wantNotFound(t, "Summary of the cancelled Import", func() error { _, err := j.Summary(context.Background(), "lab", "copy"); return err }())
}
