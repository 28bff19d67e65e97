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
		if e.Seq != int64(i+1) || e.Occurrence != occ[calls[i].key] || e.Ref != refOf(calls[i].answer.Body) {
			t.Errorf("Record call %d: got seq %d occurrence %d ref %.8s, want %d %d %.8s",
				i, e.Seq, e.Occurrence, e.Ref, i+1, occ[calls[i].key], refOf(calls[i].answer.Body))
		}
	}
	checkReplay(t, j, "lab", "sweep-1", calls)
	for key, n := range occ {
		if c, err := j.Count(context.Background(), "lab", "sweep-1", key); err != nil || c != n {
			t.Errorf("Count(%.8s): got %d, %v; want %d", key, c, err, n)
		}
	}
	// A zero Time is filled in; Stream follows the answer.
	e, err := j.Record(context.Background(), "lab", "sweep-1", runs.Entry{Key: keyOf("zero-time"), Stream: true}, jsonAnswer("x"))
	if err != nil {
		t.Fatal(err)
	}
	if e.Time.IsZero() || e.Stream {
		t.Errorf("Record with zero Time and Stream on a plain answer: got Time %v Stream %v, want a set Time and Stream false", e.Time, e.Stream)
	}
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
		if got := errors.As(err, &miss); got != tc.wantMiss {
			t.Errorf("%s: errors.As MissError = %v, want %v (err %v)", tc.name, got, tc.wantMiss, err)
			continue
		}
		if tc.wantMiss && (miss.Have != tc.wantHave || miss.Key != tc.key || miss.Run != tc.run || miss.Occurrence != tc.occ) {
			t.Errorf("%s: got %+v, want Have %d", tc.name, miss, tc.wantHave)
		}
	}
	if n, err := j.Count(ctx, "lab", "r2", keyOf("greedy")); err != nil || n != 0 {
		t.Errorf("Count on an unknown run: got %d, %v; want 0, nil", n, err)
	}
}

func testTeamIsolation(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(12)
	recordAll(t, j, "team-a", "shared-name", calls)
	key := calls[0].key
	// Team names that a careless key scheme could confuse with team-a's.
	for _, other := range []string{"team-b", "team-a/shared-name", "team-", "team-a}", "{team-a}"} {
		if _, _, err := j.Lookup(ctx, other, "shared-name", key, 1); !errors.Is(err, runs.ErrNotFound) {
			t.Errorf("team %q Lookup: got %v, want ErrNotFound", other, err)
		}
		var miss *runs.MissError
		if _, _, err := j.Lookup(ctx, other, "shared-name", key, 1); errors.As(err, &miss) {
			t.Errorf("team %q Lookup: got %v, which tells that the run exists", other, err)
		}
		if n, err := j.Count(ctx, other, "shared-name", key); n != 0 || err != nil {
			t.Errorf("team %q Count: got %d, %v", other, n, err)
		}
		_, err := j.Summary(ctx, other, "shared-name")
		wantNotFound(t, "team "+other+" Summary", err)
		if list, err := j.List(ctx, other); err != nil || len(list) != 0 {
			t.Errorf("team %q List: got %v, %v; want nothing", other, list, err)
		}
		wantNotFound(t, "team "+other+" Delete", j.Delete(ctx, other, "shared-name"))
		wantNotFound(t, "team "+other+" Export", j.Export(ctx, other, "shared-name", &bytes.Buffer{}))
		wantNotFound(t, "team "+other+" Entries", j.Entries(ctx, other, "shared-name", func(runs.Entry) error { return nil }))
	}
	// Team B's own run of the same name is separate.
	recordAll(t, j, "team-b", "shared-name", calls[:3])
	checkReplay(t, j, "team-a", "shared-name", calls)
	checkReplay(t, j, "team-b", "shared-name", calls[:3])
	if s, err := j.Summary(ctx, "team-a", "shared-name"); err != nil || !sameSummary(s, wantSummary("team-a", "shared-name", calls)) {
		t.Errorf("team-a Summary after team-b's attempts: got %+v, %v", s, err)
	}
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
		if want := wantSummary("lab", s.run, s.calls); err != nil || !sameSummary(got, want) {
			t.Errorf("Summary(%s):\n got %+v, %v\nwant %+v", s.run, got, err, want)
		}
	}
	list, err := j.List(ctx, "lab")
	if err != nil {
		t.Fatal(err)
	}
	var ids []string
	for _, s := range list {
		ids = append(ids, s.Run)
	}
	if want := []string{"newest", "middle.a", "middle.b", "oldest"}; !slices.Equal(ids, want) {
		t.Errorf("List order: got %v, want %v", ids, want)
	}
	for _, s := range list {
		if s.Team != "lab" || s.Calls == 0 {
			t.Errorf("List entry %+v", s)
		}
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
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != len(want) {
		t.Fatalf("Entries: got %d, want %d", len(got), len(want))
	}
	for i := range want {
		if !sameEntry(got[i], want[i]) {
			t.Errorf("entry %d:\n got %+v\nwant %+v", i, got[i], want[i])
		}
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
	if !errors.Is(err, stop) || n != 5 {
		t.Errorf("Entries with fn failing at 5: got %v after %d calls, want stop after 5", err, n)
	}
}

func testDelete(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(18)
	recordAll(t, j, "lab", "gone", calls)
	recordAll(t, j, "lab", "kept", calls[:4])
	if err := j.Delete(ctx, "lab", "gone"); err != nil {
		t.Fatal(err)
	}
	for _, c := range calls {
		_, _, err := j.Lookup(ctx, "lab", "gone", c.key, 1)
		wantNotFound(t, "Lookup after Delete", err)
		if n, err := j.Count(ctx, "lab", "gone", c.key); n != 0 || err != nil {
			t.Errorf("Count after Delete: got %d, %v", n, err)
		}
	}
	_, err := j.Summary(ctx, "lab", "gone")
	wantNotFound(t, "Summary after Delete", err)
	wantNotFound(t, "second Delete", j.Delete(ctx, "lab", "gone"))
	wantNotFound(t, "Export after Delete", j.Export(ctx, "lab", "gone", &bytes.Buffer{}))
	list, err := j.List(ctx, "lab")
	if err != nil || len(list) != 1 || list[0].Run != "kept" {
		t.Errorf("List after Delete: got %+v, %v; want only kept", list, err)
	}
	checkReplay(t, j, "lab", "kept", calls[:4])
	// The id can be used again, from scratch.
	recordAll(t, j, "lab", "gone", calls[5:7])
	checkReplay(t, j, "lab", "gone", calls[5:7])
	if s, err := j.Summary(ctx, "lab", "gone"); err != nil || !sameSummary(s, wantSummary("lab", "gone", calls[5:7])) {
		t.Errorf("Summary of the re-recorded run: got %+v, %v", s, err)
	}
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
				if err != nil {
					t.Error(err)
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
			if err != nil || string(a.Body) != r.body {
				t.Errorf("Lookup(%.8s, %d): got %q, %v; want %q", r.e.Key, r.e.Occurrence, a.Body, err, r.body)
			}
		}
	}
	slices.Sort(seqs)
	for i, s := range seqs {
		if s != int64(i+1) {
			t.Fatalf("Seqs are not a permutation of 1..%d: sorted %v", workers*each, seqs)
		}
	}
	for key, os := range occ {
		slices.Sort(os)
		for i, o := range os {
			if o != int64(i+1) {
				t.Fatalf("occurrences of %.8s are not 1..%d: %v", key, len(os), os)
			}
		}
	}
	if s, err := j.Summary(ctx, "lab", "busy"); err != nil || s.Calls != workers*each || s.Keys != keys || s.Bodies != workers*each {
		t.Errorf("Summary: got %+v, %v", s, err)
	}
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
		if _, err := j.Record(ctx, tc.team, tc.run, tc.entry, tc.ans); !errors.Is(err, runs.ErrInvalid) {
			t.Errorf("Record with %s: got %v, want ErrInvalid", tc.name, err)
		}
	}
	if list, err := j.List(ctx, "lab"); err != nil || len(list) != 0 {
		t.Errorf("refused Records left runs behind: %+v, %v", list, err)
	}
	if _, _, err := j.Lookup(ctx, "lab", "bad id!", "k", 1); !errors.Is(err, runs.ErrInvalid) {
		t.Errorf("Lookup with a bad id: got %v, want ErrInvalid", err)
	}
}

func testExportImport(t *testing.T, j runs.Journal) {
	ctx := context.Background()
	calls := mixedCalls(24)
	recordAll(t, j, "lab", "orig", calls)
	var archive bytes.Buffer
	if err := j.Export(ctx, "lab", "orig", &archive); err != nil {
		t.Fatal(err)
	}
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
		if !errors.Is(err, tc.wantErr) {
			t.Errorf("%s: got %v, want %v", tc.name, err, tc.wantErr)
			continue
		}
		if err != nil {
			continue
		}
		if want := wantSummary(tc.team, tc.wantRun, calls); !sameSummary(s, want) {
			t.Errorf("%s: Import returned %+v, want %+v", tc.name, s, want)
		}
		checkReplay(t, j, tc.team, tc.wantRun, calls)
	}
	// Replace swaps the whole run: a longer run replaced by a shorter one
	// keeps nothing of the longer.
	recordAll(t, j, "lab", "long", mixedCalls(40))
	if _, err := j.Import(ctx, "lab", bytes.NewReader(archive.Bytes()), runs.ImportOptions{As: "long", Replace: true}); err != nil {
		t.Fatal(err)
	}
	checkReplay(t, j, "lab", "long", calls)
	if _, _, err := j.Lookup(ctx, "lab", "long", keyOf("unique-35"), 1); !errors.Is(err, runs.ErrNotFound) {
		t.Errorf("Lookup of a call only the replaced run had: got %v, want ErrNotFound", err)
	}
	if s, err := j.Summary(ctx, "lab", "long"); err != nil || !sameSummary(s, wantSummary("lab", "long", calls)) {
		t.Errorf("Summary after Replace: got %+v, %v", s, err)
	}
	// The imported run records on from where the archive ended.
	e, err := j.Record(ctx, "lab2", "orig", calls[0].entry, calls[0].answer)
	if err != nil || e.Seq != int64(len(calls)+1) || e.Occurrence != 5 {
		t.Errorf("Record after Import: got seq %d occurrence %d, %v; want %d, 5", e.Seq, e.Occurrence, err, len(calls)+1)
	}
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
		if !errors.Is(ch.err, context.Canceled) {
			t.Errorf("%s with a cancelled context: got %v, want context.Canceled", ch.name, ch.err)
		}
	}
	if s, err := j.Summary(context.Background(), "lab", "r"); err != nil || s.Calls != 3 {
		t.Errorf("Summary: got %+v, %v; want the 3 calls recorded before", s, err)
	}
	wantNotFound(t, "Summary of the cancelled Import", func() error { _, err := j.Summary(context.Background(), "lab", "copy"); return err }())
}
