package runs

import (
	"context"
	"errors"
	"fmt"
	"strconv"

	"github.com/redis/go-redis/v9"
)

// parseMeta reads a run's tally from its m hash; an empty hash is a run
// that does not exist (ok false).
func parseMeta(m map[string]string) (t tally, ok bool, err error) {
	if len(m) == 0 {
		return tally{}, false, nil
	}
	for _, f := range [...]struct {
		name string
		p    *int64
	}{{"seq", &t.Calls}, {"up", &t.Upstream}, {"cost", &t.Cost}, {"saved", &t.Saved},
		{"keys", &t.Keys}, {"bodies", &t.Bodies}, {"bytes", &t.Bytes}} {
		s, found := m[f.name]
		if !found && f.name != "seq" {
			continue // HINCRBY has not touched it yet: zero
		}
		if *f.p, err = strconv.ParseInt(s, 10, 64); err != nil {
			return tally{}, false, fmt.Errorf("%w: run summary field %s = %.24q", ErrCorrupt, f.name, s)
		}
	}
	if t.First, err = parseSortTime(m["first"]); err != nil {
		return tally{}, false, err
	}
	if t.Last, err = parseSortTime(m["last"]); err != nil {
		return tally{}, false, err
	}
	if t.Calls < 1 {
		return tally{}, false, fmt.Errorf("%w: run summary counts %d calls", ErrCorrupt, t.Calls)
	}
	return t, true, nil
}

// meta encodes t as the fields of a run's m hash.
func meta(t *tally) []any {
	return []any{"seq", t.Calls, "up", t.Upstream, "cost", t.Cost, "saved", t.Saved,
		"keys", t.Keys, "bodies", t.Bodies, "bytes", t.Bytes, "first", sortTime(t.First), "last", sortTime(t.Last)}
}

// tally reads team's run's figures, failing with ErrNotFound if it is
// missing.
func (j *RedisJournal) tally(ctx context.Context, team, run string) (tally, error) {
	m, err := j.c.HGetAll(ctx, j.keys(team, run)[0]).Result()
	if err != nil {
		return tally{}, err
	}
	t, ok, err := parseMeta(m)
	if err != nil {
		return tally{}, err
	}
	if !ok {
		return tally{}, fmt.Errorf("%w: team has no run %q", ErrNotFound, run)
	}
	return t, nil
}

// Summary implements Journal.
func (j *RedisJournal) Summary(ctx context.Context, team, run string) (Summary, error) {
	if err := validScope(team, run); err != nil {
		return Summary{}, err
	}
	t, err := j.tally(ctx, team, run)
	if err != nil {
		return Summary{}, fmt.Errorf("runs: summary of %q: %w", run, err)
	}
	return t.summary(team, run), nil
}

// List implements Journal. It reads the team's set of run ids and then
// every run's figures in one pipeline (spread over the nodes that hold
// them on a cluster).
func (j *RedisJournal) List(ctx context.Context, team string) ([]Summary, error) {
	if err := validTeam(team); err != nil {
		return nil, err
	}
	ids, err := j.c.SMembers(ctx, j.indexKey(team)).Result()
	if err != nil {
		return nil, fmt.Errorf("runs: list: %w", err)
	}
	cmds := make([]*redis.MapStringStringCmd, len(ids))
	_, err = j.c.Pipelined(ctx, func(p redis.Pipeliner) error {
		for i, id := range ids {
			cmds[i] = p.HGetAll(ctx, j.keys(team, id)[0])
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("runs: list: %w", err)
	}
	var list []Summary
	for i, id := range ids {
		if ValidID(id) != nil {
			continue // not written by this package
		}
		t, ok, err := parseMeta(cmds[i].Val())
		if err != nil {
			return nil, fmt.Errorf("runs: list: run %q: %w", id, err)
		}
		if ok { // else deleted after its id was indexed
			list = append(list, t.summary(team, id))
		}
	}
	sortSummaries(list)
	return list, nil
}

// records reads the records with Seq from..to of team's run.
func (j *RedisJournal) records(ctx context.Context, team, run string, from, to int64) ([]record, error) {
	fields := make([]string, 0, to-from+1)
	for s := from; s <= to; s++ {
		fields = append(fields, strconv.FormatInt(s, 10))
	}
	vals, err := j.c.HMGet(ctx, j.keys(team, run)[3], fields...).Result()
	if err != nil {
		return nil, err
	}
	recs := make([]record, 0, len(vals))
	for i, v := range vals {
		seq := from + int64(i)
		s, ok := v.(string)
		if !ok {
			if n, err := j.c.Exists(ctx, j.keys(team, run)[0]).Result(); err == nil && n == 0 {
				return nil, fmt.Errorf("%w: run %q was deleted while being read", ErrNotFound, run)
			}
			return nil, fmt.Errorf("%w: entry %d is missing", ErrCorrupt, seq)
		}
		r, err := decodeRecord([]byte(s))
		if err != nil {
			return nil, err
		}
		if r.Seq != seq {
			return nil, fmt.Errorf("%w: entry %d holds seq %d", ErrCorrupt, seq, r.Seq)
		}
		recs = append(recs, r)
	}
	return recs, nil
}

// Entries implements Journal.
func (j *RedisJournal) Entries(ctx context.Context, team, run string, fn func(Entry) error) error {
	if err := validScope(team, run); err != nil {
		return err
	}
	t, err := j.tally(ctx, team, run)
	if err != nil {
		return fmt.Errorf("runs: entries of %q: %w", run, err)
	}
	for from := int64(1); from <= t.Calls; from += entriesChunk {
		recs, err := j.records(ctx, team, run, from, min(from+entriesChunk-1, t.Calls))
		if err != nil {
			return fmt.Errorf("runs: entries of %q: %w", run, err)
		}
		for i := range recs {
			if err := fn(recs[i].Entry); err != nil {
				return err
			}
		}
	}
	return nil
}

// Delete implements Journal. The run's keys go in one script, then its id
// leaves the team's set.
func (j *RedisJournal) Delete(ctx context.Context, team, run string) error {
	if err := validScope(team, run); err != nil {
		return err
	}
	existed, err := deleteScript.Run(ctx, j.c, j.keys(team, run)).Int64()
	if err != nil {
		return fmt.Errorf("runs: delete %q: %w", run, err)
	}
	if err := j.c.SRem(ctx, j.indexKey(team), run).Err(); err != nil {
		return fmt.Errorf("runs: delete %q: index: %w", run, err)
	}
	if existed == 0 {
		return fmt.Errorf("runs: delete %q: %w: team has no such run", run, ErrNotFound)
	}
	return nil
}

// snapshot implements source: the records up to the run's last Seq, then
// the sizes of their bodies in one pipeline.
func (j *RedisJournal) snapshot(ctx context.Context, team, run string) (*snapshot, error) {
	t, err := j.tally(ctx, team, run)
	if err != nil {
		return nil, fmt.Errorf("runs: export %q: %w", run, err)
	}
	s := &snapshot{sizes: map[string]int64{}}
	for from := int64(1); from <= t.Calls; from += entriesChunk {
		recs, err := j.records(ctx, team, run, from, min(from+entriesChunk-1, t.Calls))
		if err != nil {
			return nil, fmt.Errorf("runs: export %q: %w", run, err)
		}
		s.recs = append(s.recs, recs...)
	}
	sizes := map[string]*redis.IntCmd{}
	_, err = j.c.Pipelined(ctx, func(p redis.Pipeliner) error {
		for _, r := range s.recs {
			if sizes[r.Ref] == nil {
				raw, _ := rawRef(r.Ref)
				sizes[r.Ref] = p.HStrLen(ctx, j.keys(team, run)[4], string(raw))
			}
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("runs: export %q: %w", run, err)
	}
	for ref, c := range sizes {
		s.sizes[ref] = c.Val() // a missing body reads as 0 here and fails in body
	}
	return s, nil
}

// body implements source.
func (j *RedisJournal) body(ctx context.Context, team, run, ref string) ([]byte, error) {
	raw, err := rawRef(ref)
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrCorrupt, err)
	}
	b, err := j.c.HGet(ctx, j.keys(team, run)[4], string(raw)).Bytes()
	if errors.Is(err, redis.Nil) {
		return nil, fmt.Errorf("%w: body %.16s… is missing (run deleted during the export?)", ErrCorrupt, ref)
	}
	return b, err
}

// store implements sink: the whole run in one script, then its id joins
// the team's set.
func (j *RedisJournal) store(ctx context.Context, team, run string, a *archive, replace bool) error {
	rep := "0"
	if replace {
		rep = "1"
	}
	m := meta(&a.tally)
	args := make([]any, 0, 6+len(m)+2*len(a.order)+6*len(a.recs))
	args = append(args, rep, len(m)/2)
	args = append(args, m...)
	args = append(args, len(a.recs)) // o: the last occurrence of each key wins
	for i := range a.recs {
		args = append(args, a.recs[i].Key, a.recs[i].Occurrence)
	}
	args = append(args, len(a.recs))
	for i := range a.recs {
		args = append(args, strconv.FormatInt(a.recs[i].Occurrence, 10)+":"+a.recs[i].Key, a.recs[i].Seq)
	}
	args = append(args, len(a.recs))
	for i := range a.recs {
		v, err := encodeRecord(&a.recs[i])
		if err != nil {
			return err
		}
		args = append(args, a.recs[i].Seq, v)
	}
	args = append(args, len(a.order))
	for _, ref := range a.order {
		raw, _ := rawRef(ref)
		args = append(args, raw, a.bodies[ref])
	}
	ok, err := importScript.Run(ctx, j.c, j.keys(team, run), args...).Int64()
	if err != nil {
		return fmt.Errorf("runs: import %q: %w", run, err)
	}
	if ok == 0 {
		return fmt.Errorf("runs: import %q: %w: the team already has it", run, ErrExists)
	}
	if err := j.c.SAdd(ctx, j.indexKey(team), run).Err(); err != nil {
		return fmt.Errorf("runs: import %q: index: %w", run, err)
	}
	return nil
}
