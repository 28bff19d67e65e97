package runs

import (
	"context"
	"errors"
	"fmt"
	"io"
	"strconv"
	"time"

	"github.com/redis/go-redis/v9"
)

// RedisOptions configure a RedisJournal. The zero value is usable.
type RedisOptions struct {
	// Prefix starts every key. Empty means "stint".
	Prefix string
}

// RedisJournal is a Journal on Redis or Redis Cluster, for proxies that run
// as several replicas. It is safe for concurrent use, and any number of
// RedisJournals in any number of processes may share one Redis with the
// same Prefix.
//
// The five keys of one run are hash-tagged with the team and the run id,
// "<prefix>:run:{<team>/<run>}:m" and its siblings :o :x :e :b, so each
// operation on a run is one Lua script on one slot, atomic also on a
// cluster. Each team's run ids are also kept in a set,
// "<prefix>:runs:{<team>}", which lives in the team's own slot and is
// updated after the run's keys: List reads it and skips ids whose run is
// gone. (A run id cannot hold '/' or '}', so no two (team, run) pairs share
// keys whatever the team's name.)
//
// Durability is Redis's: Record returns once Redis has acknowledged the
// script; run Redis with appendonly (and appendfsync always, or WAIT on
// replicas) for a journal that survives a Redis crash.
type RedisJournal struct {
	c      redis.UniversalClient
	prefix string
}

var _ Journal = (*RedisJournal)(nil)

// NewRedis returns a RedisJournal on c. The caller keeps ownership of c and
// closes it after the journal's last use.
func NewRedis(c redis.UniversalClient, opts RedisOptions) *RedisJournal {
	p := opts.Prefix
	if p == "" {
		p = "stint"
	}
	return &RedisJournal{c: c, prefix: p}
}

// keys returns the five keys of team's run, in the scripts' order.
func (j *RedisJournal) keys(team, run string) []string {
	tag := j.prefix + ":run:{" + team + "/" + run + "}:"
	return []string{tag + "m", tag + "o", tag + "x", tag + "e", tag + "b"}
}

func (j *RedisJournal) indexKey(team string) string { return j.prefix + ":runs:{" + team + "}" }

// sortTime encodes Unix ns as a fixed-width decimal whose string order is
// time order, for the scripts to compare (Lua's doubles cannot hold ns).
func sortTime(ns int64) string {
	return fmt.Sprintf("%020d", uint64(ns)^(1<<63))
}

func parseSortTime(s string) (int64, error) {
	u, err := strconv.ParseUint(s, 10, 64)
	if err != nil || len(s) != 20 {
		return 0, fmt.Errorf("%w: time %.24q", ErrCorrupt, s)
	}
	return int64(u ^ (1 << 63)), nil
}

// Record implements Journal. One script stores the entry; the team's set
// of run ids is updated after it. If only that update fails, Record returns
// the stored entry together with the error: the entry is durable (do not
// record it again), and List may miss the run until its next Record.
func (j *RedisJournal) Record(ctx context.Context, team, run string, e Entry, a Answer) (Entry, error) {
	if err := validScope(team, run); err != nil {
		return Entry{}, err
	}
	r, err := newRecord(e, a, time.Now)
	if err != nil {
		return Entry{}, err
	}
	raw, _ := rawRef(r.Ref)
	blob, err := encodeRecord(&r)
	if err != nil {
		return Entry{}, err
	}
	up := "0"
	if r.Upstream {
		up = "1"
	}
	res, err := recordScript.Run(ctx, j.c, j.keys(team, run),
		r.Key, raw, a.Body, blob, up, r.CostNanos, r.SavedNanos, sortTime(r.Time.UnixNano())).Int64Slice()
	if err != nil {
		return Entry{}, fmt.Errorf("runs: record into %q: %w", run, err)
	}
	if len(res) != 2 {
		return Entry{}, fmt.Errorf("runs: record into %q: script returned %v", run, res)
	}
	r.Seq, r.Occurrence = res[0], res[1]
	if err := j.c.SAdd(ctx, j.indexKey(team), run).Err(); err != nil {
		return r.Entry, fmt.Errorf("runs: record into %q: entry %d stored, run index not updated: %w", run, r.Seq, err)
	}
	return r.Entry, nil
}

// Lookup implements Journal.
func (j *RedisJournal) Lookup(ctx context.Context, team, run, key string, occurrence int64) (Entry, Answer, error) {
	if err := validScope(team, run); err != nil {
		return Entry{}, Answer{}, err
	}
	if err := validKey(key); err != nil {
		return Entry{}, Answer{}, err
	}
	res, err := lookupScript.Run(ctx, j.c, j.keys(team, run), key, strconv.FormatInt(occurrence, 10)).Slice()
	if err != nil {
		return Entry{}, Answer{}, fmt.Errorf("runs: lookup in %q: %w", run, err)
	}
	rec, body, err := lookupReply(res, run, key, occurrence)
	if err != nil {
		return Entry{}, Answer{}, lookupErr(run, err)
	}
	return rec.Entry, rec.answer(body), nil
}

// lookupReply interprets lookupScript's reply.
func lookupReply(res []any, run, key string, occurrence int64) (record, []byte, error) {
	if len(res) == 0 {
		return record{}, nil, fmt.Errorf("runs: lookup script returned nothing")
	}
	code, _ := res[0].(int64)
	str := func(i int) string {
		if i < len(res) {
			s, _ := res[i].(string)
			return s
		}
		return ""
	}
	switch code {
	case 0:
		return record{}, nil, fmt.Errorf("%w: team has no run %q", ErrNotFound, run)
	case 1:
		have, err := strconv.ParseInt(str(1), 10, 64)
		if err != nil {
			return record{}, nil, fmt.Errorf("%w: occurrence counter %q", ErrCorrupt, str(1))
		}
		return record{}, nil, &MissError{Run: run, Key: key, Occurrence: occurrence, Have: have}
	case 2:
		return record{}, nil, fmt.Errorf("%w: entry %s is missing", ErrCorrupt, str(1))
	case 3:
		return record{}, nil, fmt.Errorf("%w: body of an entry is missing", ErrCorrupt)
	case 4:
	default:
		return record{}, nil, fmt.Errorf("runs: lookup script returned %v", res[0])
	}
	rec, err := decodeRecord([]byte(str(1)))
	if err != nil {
		return record{}, nil, err
	}
	if rec.Key != key || rec.Occurrence != occurrence {
		return record{}, nil, fmt.Errorf("%w: index of %q points at entry %d of another call", ErrCorrupt, run, rec.Seq)
	}
	body := []byte(str(2))
	if err := checkBody(rec.Ref, body); err != nil {
		return record{}, nil, err
	}
	return rec, body, nil
}

// Count implements Journal.
func (j *RedisJournal) Count(ctx context.Context, team, run, key string) (int64, error) {
	if err := validScope(team, run); err != nil {
		return 0, err
	}
	if err := validKey(key); err != nil {
		return 0, err
	}
	n, err := j.c.HGet(ctx, j.keys(team, run)[1], key).Int64()
	if errors.Is(err, redis.Nil) {
		return 0, nil
	}
	if err != nil {
		return 0, fmt.Errorf("runs: count in %q: %w", run, err)
	}
	return n, nil
}

// Export implements Journal. Records are read as of the run's last Seq when
// Export starts (entries never change once recorded); an Export racing a
// Delete of its run fails.
func (j *RedisJournal) Export(ctx context.Context, team, run string, w io.Writer) error {
	return export(ctx, j, team, run, w, time.Now())
}

// Import implements Journal.
func (j *RedisJournal) Import(ctx context.Context, team string, r io.Reader, opts ImportOptions) (Summary, error) {
	return importRun(ctx, j, team, r, opts)
}
