package runs

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"slices"
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
		{"keys", &t.Keys}, {"bodies", &t.Bodies}, {"bytes", &t.Bytes}, {"stored", &t.Stored}} {
		s, found := m[f.name]
		if !found && f.name == "stored" {
			t.Stored = t.Bytes // a run written before stored was kept
			continue
		}
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
		"keys", t.Keys, "bodies", t.Bodies, "bytes", t.Bytes, "stored", t.Stored, "first", sortTime(t.First), "last", sortTime(t.Last)}
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
	tallies, err := j.tallies(ctx, team)
	if err != nil {
		return nil, fmt.Errorf("runs: list: %w", err)
	}
	list := make([]Summary, 0, len(tallies))
	for id, t := range tallies {
		list = append(list, t.summary(team, id))
	}
	sortSummaries(list)
	return list, nil
}

// tallies reads the figures of every run of team, by run id.
func (j *RedisJournal) tallies(ctx context.Context, team string) (map[string]tally, error) {
	ids, err := j.c.SMembers(ctx, j.indexKey(team)).Result()
	if err != nil {
		return nil, err
	}
	cmds := make([]*redis.MapStringStringCmd, len(ids))
	_, err = j.c.Pipelined(ctx, func(p redis.Pipeliner) error {
		for i, id := range ids {
			cmds[i] = p.HGetAll(ctx, j.keys(team, id)[0])
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	out := make(map[string]tally, len(ids))
	for i, id := range ids {
		if ValidID(id) != nil {
			continue // not written by this package
		}
		t, ok, err := parseMeta(cmds[i].Val())
		if err != nil {
			return nil, fmt.Errorf("run %q: %w", id, err)
		}
		if ok { // else deleted after its id was indexed
			out[id] = t
		}
	}
	return out, nil
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
	if _, err := j.usage(ctx, team); err != nil { // counted before the run goes
		return fmt.Errorf("runs: delete %q: usage: %w", run, err)
	}
	res, err := deleteScript.Run(ctx, j.c, j.keys(team, run)).Int64Slice()
	if err == nil && len(res) != 2 {
		err = fmt.Errorf("script returned %v", res)
	}
	if err != nil {
		return fmt.Errorf("runs: delete %q: %w", run, err)
	}
	if err := j.c.SRem(ctx, j.indexKey(team), run).Err(); err != nil {
		return fmt.Errorf("runs: delete %q: index: %w", run, err)
	}
	if res[0] == 0 {
		return fmt.Errorf("runs: delete %q: %w: team has no such run", run, ErrNotFound)
	}
	if err := j.adjust(ctx, team, -res[1]); err != nil {
		return fmt.Errorf("runs: delete %q: usage: %w", run, err)
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
		if c.Val() == 0 {
			// Empty, or imported in chunks: add up the chunks.
			raw, _ := rawRef(ref)
			for i := uint32(0); ; i++ {
				n, err := j.c.HStrLen(ctx, j.keys(team, run)[4], string(chunkKey(raw, i))).Result()
				if err != nil {
					return nil, fmt.Errorf("runs: export %q: %w", run, err)
				}
				if n == 0 {
					break
				}
				s.sizes[ref] += n
			}
		}
	}
	return s, nil
}

// body implements source: a body recorded whole in one command, one
// imported in chunks a chunk per command.
func (j *RedisJournal) body(ctx context.Context, team, run, ref string, fn func([]byte) error) error {
	raw, err := rawRef(ref)
	if err != nil {
		return fmt.Errorf("%w: %w", ErrCorrupt, err)
	}
	key := j.keys(team, run)[4]
	b, err := j.c.HGet(ctx, key, string(raw)).Bytes()
	if err == nil {
		return fn(b)
	}
	if !errors.Is(err, redis.Nil) {
		return err
	}
	for i := uint32(0); ; i++ {
		b, err := j.c.HGet(ctx, key, string(chunkKey(raw, i))).Bytes()
		switch {
		case errors.Is(err, redis.Nil) && i == 0:
			return fmt.Errorf("%w: body %.16s… is missing (run deleted during the export?)", ErrCorrupt, ref)
		case errors.Is(err, redis.Nil):
			return nil
		case err != nil:
			return err
		}
		if err := fn(b); err != nil {
			return err
		}
	}
}

// stage implements sink: it checks the team may import run and reserves
// need bytes of its quota under a hold (which lapses if this process dies
// mid-import), and returns the staging keys to write the run into: the
// run's five keys with ":s:<nonce>" in their names, in the run's slot,
// expiring unless the import commits.
func (j *RedisJournal) stage(ctx context.Context, team, run string, replace bool, need int64) (staging, error) {
	keys := j.keys(team, run)
	if !replace {
		n, err := j.c.Exists(ctx, keys[0]).Result()
		if err != nil {
			return nil, fmt.Errorf("runs: import %q: %w", run, err)
		}
		if n > 0 {
			return nil, fmt.Errorf("runs: import %q: %w: the team already has it", run, ErrExists)
		}
	}
	var nonce [8]byte
	_, _ = rand.Read(nonce[:])
	s := &redisStage{j: j, team: team, run: run, replace: replace, hold: hex.EncodeToString(nonce[:]), keys: keys}
	var old int64
	if replace {
		m, err := j.c.HGetAll(ctx, keys[0]).Result()
		if err != nil {
			return nil, fmt.Errorf("runs: import %q: %w", run, err)
		}
		if t, ok, err := parseMeta(m); err == nil && ok {
			old = t.Stored
		}
	}
	s.holdBytes = max(need-old, 0)
	if err := j.reserve(ctx, team, s.holdBytes, s.hold); err != nil {
		return nil, fmt.Errorf("runs: import %q: %w", run, err)
	}
	tag := j.prefix + ":run:{" + team + "/" + run + "}:s:" + s.hold + ":"
	for i, suffix := range [...]string{"m", "o", "x", "e", "b"} {
		s.staged[i] = tag + suffix
	}
	s.pend = map[string][]any{}
	return s, nil
}

// redisStage is a run being imported into staging keys beside the run's.
type redisStage struct {
	j         *RedisJournal
	team, run string
	replace   bool
	hold      string    // the nonce naming the hold and the staging keys
	holdBytes int64     // what the hold reserves
	keys      []string  // the run's five keys
	staged    [5]string // the staging keys, in the same order
	pend      map[string][]any
	pendBytes int
	wrote     bool // staging keys may exist
	released  bool
}

func (s *redisStage) add(key int, field, value any, n int) {
	k := s.staged[key]
	s.pend[k] = append(s.pend[k], field, value)
	s.pendBytes += n
}

func (s *redisStage) entries(ctx context.Context, recs []record) error {
	for i := range recs {
		r := &recs[i]
		v, err := encodeRecord(r)
		if err != nil {
			return err
		}
		s.add(1, r.Key, r.Occurrence, len(r.Key)+8)
		s.add(2, strconv.FormatInt(r.Occurrence, 10)+":"+r.Key, r.Seq, len(r.Key)+16)
		s.add(3, r.Seq, v, len(v)+8)
	}
	return s.flushIfFull(ctx)
}

func (s *redisStage) body(ctx context.Context, raw []byte, chunk int, data []byte) error {
	field := string(raw)
	if chunk >= 0 {
		field = string(chunkKey(raw, uint32(chunk)))
	}
	s.add(4, field, data, len(field)+len(data))
	return s.flushIfFull(ctx)
}

func (s *redisStage) flushIfFull(ctx context.Context) error {
	if s.pendBytes < stageBuffer {
		return nil
	}
	return s.flush(ctx)
}

// flush writes what is buffered into the staging keys, renews their expiry
// and the hold's, in one pipeline.
func (s *redisStage) flush(ctx context.Context) error {
	s.wrote = true
	now := s.j.now()
	_, err := s.j.c.Pipelined(ctx, func(p redis.Pipeliner) error {
		for key, fv := range s.pend {
			for len(fv) > 0 {
				n := min(len(fv), 2*200)
				p.HSet(ctx, key, fv[:n]...)
				fv = fv[n:]
			}
		}
		for _, key := range s.staged {
			p.PExpire(ctx, key, holdTTL)
		}
		return nil
	})
	if err == nil {
		// Renew the hold; a lost renewal only lets it lapse early.
		err = s.j.c.HSet(ctx, s.j.usageKey(s.team), "h:"+s.hold, fmt.Sprintf("%d:%d", s.holdBytes, now.Add(holdTTL).UnixMilli())).Err()
	}
	if err != nil {
		return fmt.Errorf("runs: import %q: stage: %w", s.run, err)
	}
	clear(s.pend)
	s.pendBytes = 0
	return nil
}

func (s *redisStage) commit(ctx context.Context, t *tally) error {
	k := s.staged[0]
	s.pend[k] = append(s.pend[k], meta(t)...)
	if err := s.flush(ctx); err != nil {
		return err
	}
	m, err := s.j.c.HGetAll(ctx, s.keys[0]).Result()
	if err != nil {
		return fmt.Errorf("runs: import %q: %w", s.run, err)
	}
	ot, exists, err := parseMeta(m)
	if err != nil {
		return fmt.Errorf("runs: import %q: %w", s.run, err)
	}
	if exists && !s.replace {
		return fmt.Errorf("runs: import %q: %w: the team already has it", s.run, ErrExists)
	}
	var old int64
	if exists {
		old = ot.Stored
	}
	delta := t.Stored - old
	now := s.j.now()
	err = s.j.quotaScript(ctx, s.team, delta, settleScript, now.UnixMilli(), s.j.quota, delta, s.hold)
	s.released = err == nil || errors.As(err, new(*QuotaError))
	if err != nil {
		return fmt.Errorf("runs: import %q: %w", s.run, err)
	}
	rep := "0"
	if s.replace {
		rep = "1"
	}
	res, err := commitImportScript.Run(ctx, s.j.c, append(slices.Clone(s.keys), s.staged[:]...), rep).Int64Slice()
	switch {
	case err == nil && len(res) == 1 && res[0] == 0:
		err = fmt.Errorf("%w: the team already has it", ErrExists)
	case err == nil && len(res) != 2:
		err = fmt.Errorf("script returned %v", res)
	}
	if err != nil {
		s.j.adjustQuietly(s.team, -delta)
		return fmt.Errorf("runs: import %q: %w", s.run, err)
	}
	s.wrote = false // the staging keys are the run's now
	if res[1] != old {
		// The run changed between the count and the commit.
		s.j.adjustQuietly(s.team, old-res[1])
	}
	if err := s.j.c.SAdd(ctx, s.j.indexKey(s.team), s.run).Err(); err != nil {
		return fmt.Errorf("runs: import %q: index: %w", s.run, err)
	}
	return nil
}

func (s *redisStage) abort() {
	ctx, cancel := context.WithTimeout(context.Background(), abortTimeout)
	defer cancel()
	if s.wrote {
		_ = s.j.c.Del(ctx, s.staged[:]...).Err()
	}
	if !s.released {
		_ = s.j.c.HDel(ctx, s.j.usageKey(s.team), "h:"+s.hold).Err()
	}
}
