package runs_test

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"path/filepath"
	"strconv"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/cache/boltgroup"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/internal/redistest"
)

// backend makes fresh, empty journals of one kind.
type backend struct {
	name string
	open func(t testing.TB) runs.Journal
}

// boltBackend opens each journal on a new bbolt file, as the proxy opens
// its shared file.
func boltBackend() backend {
	return backend{name: "bolt", open: func(t testing.TB) runs.Journal {
		j, _ := openBolt(t, filepath.Join(t.TempDir(), "stint.db"))
		return j
	}}
}

func openBolt(t testing.TB, path string) (*runs.BoltJournal, *bbolt.DB) {
	t.Helper()
	db, err := bbolt.Open(path, 0o600, &bbolt.Options{Timeout: time.Second, NoFreelistSync: true, FreelistType: bbolt.FreelistMapType})
	require.NoError(t, err)
	db.MaxBatchDelay = 2 * time.Millisecond // what boltstore.Open sets on the shared file
	t.Cleanup(func() { _ = db.Close() })
	// Writes go through a group committer, as stint serve's do.
	j, err := runs.NewBolt(db, runs.BoltOptions{Update: boltgroup.New(db).Update})
	require.NoError(t, err)
	return j, db
}

// redisBackend gives each journal its own key prefix on one standalone
// redis-server started for t.
func redisBackend(t testing.TB) backend {
	srv := redistest.Start(t)
	c := srv.Client(t)
	var n atomic.Int64
	return backend{name: "redis", open: func(testing.TB) runs.Journal {
		return runs.NewRedis(c, runs.RedisOptions{Prefix: "t" + strconv.FormatInt(n.Add(1), 10)})
	}}
}

// clusterBackend is redisBackend on a three-master Redis Cluster, so that
// different runs live on different nodes.
func clusterBackend(t testing.TB) backend {
	cl := redistest.StartCluster(t, 3)
	c := cl.Client(t)
	var n atomic.Int64
	return backend{name: "cluster", open: func(testing.TB) runs.Journal {
		return runs.NewRedis(c, runs.RedisOptions{Prefix: "t" + strconv.FormatInt(n.Add(1), 10)})
	}}
}

// base is the time of the first call in the fixtures.
var base = time.Date(2026, 3, 14, 9, 26, 53, 589793238, time.UTC)

// call is one call a test records.
type call struct {
	key    string
	entry  runs.Entry
	answer runs.Answer
}

// keyOf is a realistic request key: a hex SHA-256.
func keyOf(name string) string {
	sum := sha256.Sum256([]byte(name))
	return hex.EncodeToString(sum[:])
}

// jsonAnswer is a completion-shaped JSON answer.
func jsonAnswer(text string) runs.Answer {
	return runs.Answer{Status: 200, ContentType: "application/json",
		Body: fmt.Appendf(nil, `{"id":"cmpl-1","object":"text_completion","choices":[{"index":0,"text":%q,"finish_reason":"stop"}]}`, text)}
}

// streamAnswer is the text/event-stream bytes of a streamed answer.
func streamAnswer(words ...string) runs.Answer {
	var b bytes.Buffer
	for _, w := range words {
		fmt.Fprintf(&b, "data: {\"choices\":[{\"index\":0,\"text\":%q}]}\n\n", w)
	}
	b.WriteString("data: [DONE]\n\n")
	return runs.Answer{Status: 200, ContentType: "text/event-stream", Body: b.Bytes(), Stream: true}
}

// mixedCalls is a run of n calls: three keys repeated with sampled (each
// different) answers, one key with the same answer every time, streamed
// and plain bodies, an error answer, an empty body and a 300 KB body.
func mixedCalls(n int) []call {
	var calls []call
	for i := range n {
		var c call
		switch i % 6 {
		case 0, 1, 2:
			c.key = keyOf(fmt.Sprintf("sampled-%d", i%3))
			c.answer = jsonAnswer(fmt.Sprintf("sample %d of prompt %d", i, i%3))
		case 3:
			c.key = keyOf("greedy")
			c.answer = jsonAnswer("always the same")
		case 4:
			c.key = keyOf(fmt.Sprintf("stream-%d", i%2))
			c.answer = streamAnswer("once", "upon", fmt.Sprintf("a time %d", i))
		case 5:
			c.key = keyOf(fmt.Sprintf("unique-%d", i))
			switch i / 6 % 3 {
			case 0:
				c.answer = runs.Answer{Status: 429, ContentType: "application/json", Body: []byte(`{"error":{"message":"slow down"}}`)}
			case 1:
				c.answer = runs.Answer{Status: 200, ContentType: "application/json"}
			default:
				c.answer = jsonAnswer(string(bytes.Repeat([]byte("long "), 60_000)))
			}
		}
		c.entry = runs.Entry{
			Key: c.key, Outcome: []string{"miss", "hit", "bypass"}[i%3], Upstream: i%3 != 1,
			CostNanos: int64(1000 * (i % 7)), SavedNanos: int64(500 * (i % 5)), Model: "tiny-model",
			// Not monotonic: concurrent recorders' times interleave.
			Time: base.Add(time.Duration(i*37%n) * time.Millisecond),
		}
		calls = append(calls, c)
	}
	return calls
}

// recordAll records calls into team's run and returns the stored entries.
func recordAll(t testing.TB, j runs.Journal, team, run string, calls []call) []runs.Entry {
	t.Helper()
	var out []runs.Entry
	for i, c := range calls {
		e, err := j.Record(context.Background(), team, run, c.entry, c.answer)
		require.NoError(t, err, "Record call %d", i)
		out = append(out, e)
	}
	return out
}

// wantSummary is the summary of calls, counted here independently of the
// package.
func wantSummary(team, run string, calls []call) runs.Summary {
	s := runs.Summary{Team: team, Run: run}
	keys, bodies := map[string]bool{}, map[string]bool{}
	for i, c := range calls {
		if i == 0 || c.entry.Time.Before(s.First) {
			s.First = c.entry.Time
		}
		if i == 0 || c.entry.Time.After(s.Last) {
			s.Last = c.entry.Time
		}
		s.Calls++
		if c.entry.Upstream {
			s.Upstream++
		}
		s.CostNanos += c.entry.CostNanos
		s.SavedNanos += c.entry.SavedNanos
		keys[c.key] = true
		if !bodies[string(c.answer.Body)] {
			bodies[string(c.answer.Body)] = true
			s.Bytes += int64(len(c.answer.Body))
		}
	}
	s.Keys, s.Bodies = int64(len(keys)), int64(len(bodies))
	return s
}

// checkReplay looks every call up by (key, occurrence), numbering
// occurrences itself, and wants exactly the recorded bytes back.
func checkReplay(t testing.TB, j runs.Journal, team, run string, calls []call) {
	t.Helper()
	occ := map[string]int64{}
	for i, c := range calls {
		occ[c.key]++
		e, a, err := j.Lookup(context.Background(), team, run, c.key, occ[c.key])
		require.NoError(t, err, "Lookup call %d (occurrence %d)", i, occ[c.key])
		require.True(t, bytes.Equal(a.Body, c.answer.Body), "call %d: body differs: got %d bytes %.60q, want %d bytes %.60q", i, len(a.Body), a.Body, len(c.answer.Body), c.answer.Body)
		require.Equal(t, c.answer.Status, a.Status, "call %d: status", i)
		require.Equal(t, c.answer.ContentType, a.ContentType, "call %d: content type", i)
		require.Equal(t, c.answer.Stream, a.Stream, "call %d: stream", i)
		want := c.entry
		want.Seq, want.Occurrence, want.Ref, want.Stream = int64(i+1), occ[c.key], refOf(c.answer.Body), c.answer.Stream
		require.True(t, sameEntry(e, want), "call %d: entry\n got %+v\nwant %+v", i, e, want)
	}
}

func refOf(b []byte) string {
	sum := sha256.Sum256(b)
	return hex.EncodeToString(sum[:])
}

// sameEntry compares entries, times by instant.
func sameEntry(a, b runs.Entry) bool {
	ta, tb := a.Time, b.Time
	a.Time, b.Time = time.Time{}, time.Time{}
	return a == b && ta.Equal(tb)
}

// sameSummary compares summaries, times by instant.
func sameSummary(a, b runs.Summary) bool {
	fa, la, fb, lb := a.First, a.Last, b.First, b.Last
	a.First, a.Last, b.First, b.Last = time.Time{}, time.Time{}, time.Time{}, time.Time{}
	return a == b && fa.Equal(fb) && la.Equal(lb)
}

// wantNotFound fails t unless err wraps runs.ErrNotFound.
func wantNotFound(t testing.TB, what string, err error) {
	t.Helper()
	assert.ErrorIs(t, err, runs.ErrNotFound, "%s", what)
}

// wantNoTrace fails t unless team has no run id and no runs at all.
func wantNoTrace(t testing.TB, j runs.Journal, team, run string) {
	t.Helper()
	ctx := context.Background()
	s, err := j.Summary(ctx, team, run)
	assert.ErrorIs(t, err, runs.ErrNotFound, "Summary of %q = %+v", run, s)
	list, err := j.List(ctx, team)
	assert.NoError(t, err, "List")
	assert.Empty(t, list, "List")
}
