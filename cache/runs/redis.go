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
	// QuotaBytes bounds what each team's runs may hold (see Usage). 0
	// means DefaultQuotaBytes; -1 means no quota.
	QuotaBytes int64
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
// What each team's runs hold is counted in "<prefix>:runs-usage:{<team>}"
// (a hash in the team's slot: "used", and a reservation per import in
// progress, which lapses after holdTTL without writes). A Record is
// counted there before its script runs and corrected after; an Import is
// reserved there, written into staging keys beside the run's (the same
// slot, expiring unless it commits) and renamed into place by one script.
// Since the count and the run live in different slots, a process dying
// between the two can leave the count high by one entry or one import:
// never low.
//
// Durability is Redis's: Record returns once Redis has acknowledged the
// script; run Redis with appendonly (and appendfsync always, or WAIT on
// replicas) for a journal that survives a Redis crash.
type RedisJournal struct {
	c      redis.UniversalClient
	prefix string
	quota  int64 // <= 0: none
	now    func() time.Time
}

var _ Journal = (*RedisJournal)(nil)

// NewRedis returns a RedisJournal on c. The caller keeps ownership of c and
// closes it after the journal's last use.
func NewRedis(c redis.UniversalClient, opts RedisOptions) *RedisJournal {
	p := opts.Prefix
	if p == "" {
		p = "stint"
	}
	return &RedisJournal{c: c, prefix: p, quota: quotaOf(opts.QuotaBytes), now: time.Now}
}

// keys returns the five keys of team's run, in the scripts' order.
func (j *RedisJournal) keys(team, run string) []string {
	tag := j.prefix + ":run:{" + team + "/" + run + "}:"
	return []string{tag + "m", tag + "o", tag + "x", tag + "e", tag + "b"}
}

func (j *RedisJournal) indexKey(team string) string { return j.prefix + ":runs:{" + team + "}" }

// usageKey is the hash of what team's runs hold and imports reserve, in
// the team's slot beside its index.
func (j *RedisJournal) usageKey(team string) string { return j.prefix + ":runs-usage:{" + team + "}" }

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

// Record implements Journal. The entry and its body are first counted
// against the team's quota (its usage hash, in the team's slot), then one
// script stores the entry, and the team's set of run ids is updated after
// it; a body the run already had is then uncounted. If only the set's
// update fails, Record returns the stored entry together with the error:
// the entry is durable (do not record it again), and List may miss the
// run until its next Record.
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
	charged := r.stored(true, len(a.Body))
	if err := j.reserve(ctx, team, charged, ""); err != nil {
		// Near the quota, a body the run holds already costs only its
		// entry.
		if !errors.Is(err, ErrQuota) || !j.hasBody(ctx, team, run, raw) {
			return Entry{}, fmt.Errorf("runs: record into %q: %w", run, err)
		}
		charged = r.stored(false, 0)
		if err := j.reserve(ctx, team, charged, ""); err != nil {
			return Entry{}, fmt.Errorf("runs: record into %q: %w", run, err)
		}
	}
	res, err := recordScript.Run(ctx, j.c, j.keys(team, run),
		r.Key, raw, a.Body, blob, up, r.CostNanos, r.SavedNanos, sortTime(r.Time.UnixNano()), entryBytes(&r)).Int64Slice()
	if err == nil && len(res) != 3 {
		err = fmt.Errorf("script returned %v", res)
	}
	if err != nil {
		j.adjustQuietly(team, -charged)
		return Entry{}, fmt.Errorf("runs: record into %q: %w", run, err)
	}
	// Count what was stored: the body only if the run lacked it (a
	// concurrent Delete can make a body counted as held new again).
	if stored := r.stored(res[2] == 1, len(a.Body)); stored != charged {
		j.adjustQuietly(team, stored-charged)
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

// Usage implements Journal.
func (j *RedisJournal) Usage(ctx context.Context, team string) (Usage, error) {
	if err := validTeam(team); err != nil {
		return Usage{}, err
	}
	used, err := j.usage(ctx, team)
	if err != nil {
		return Usage{}, fmt.Errorf("runs: usage: %w", err)
	}
	return Usage{Bytes: used, QuotaBytes: j.quota}, nil
}

// usage reads what team's runs hold, counting it first if no Record,
// Delete or Import of this version has: the sum over its runs' figures,
// set only if still unset (HSETNX), so concurrent counts agree.
func (j *RedisJournal) usage(ctx context.Context, team string) (int64, error) {
	v, err := j.c.HGet(ctx, j.usageKey(team), "used").Int64()
	if err == nil {
		return v, nil
	}
	if !errors.Is(err, redis.Nil) {
		return 0, err
	}
	tallies, err := j.tallies(ctx, team)
	if err != nil {
		return 0, err
	}
	var sum int64
	for _, t := range tallies {
		sum += t.Stored
	}
	if err := j.c.HSetNX(ctx, j.usageKey(team), "used", sum).Err(); err != nil {
		return 0, err
	}
	return j.c.HGet(ctx, j.usageKey(team), "used").Int64()
}

// quotaScript runs one of the quota scripts on team's usage hash, counting
// the team's usage first if the script finds it uncounted; it fails with a
// *QuotaError when the script refuses need bytes.
func (j *RedisJournal) quotaScript(ctx context.Context, team string, need int64, s *redis.Script, args ...any) error {
	for range 2 {
		res, err := s.Run(ctx, j.c, []string{j.usageKey(team)}, args...).Int64Slice()
		if err != nil {
			return err
		}
		switch {
		case len(res) == 1 && res[0] == 1:
			return nil
		case len(res) == 2 && res[0] == 0:
			return &QuotaError{Team: team, Used: res[1], Need: need, Quota: j.quota}
		case len(res) == 1 && res[0] == -1:
			if _, err := j.usage(ctx, team); err != nil {
				return err
			}
		default:
			return fmt.Errorf("quota script returned %v", res)
		}
	}
	return errors.New("runs: the team's usage could not be counted")
}

// reserve admits need bytes for team: counted at once, or with hold set
// reserved under that hold (see reserveScript) until settle.
func (j *RedisJournal) reserve(ctx context.Context, team string, need int64, hold string) error {
	now := j.now()
	return j.quotaScript(ctx, team, need, reserveScript,
		now.UnixMilli(), j.quota, need, hold, now.Add(holdTTL).UnixMilli())
}

// adjust adds delta to what team's runs hold.
func (j *RedisJournal) adjust(ctx context.Context, team string, delta int64) error {
	return j.quotaScript(ctx, team, 0, adjustScript, delta)
}

// adjustQuietly is adjust for a correction after a failure, when there is
// no one to report its own failure to: the count then stays too high (an
// import or a record is refused early), never too low.
func (j *RedisJournal) adjustQuietly(team string, delta int64) {
	ctx, cancel := context.WithTimeout(context.Background(), abortTimeout)
	defer cancel()
	_ = j.adjust(ctx, team, delta)
}

// holdTTL is how long an import's reservation outlives its last write:
// the reservation of an import whose process died lapses after it.
const holdTTL = 30 * time.Minute

// hasBody reports whether team's run holds the body of raw, whole or in
// chunks (false also when Redis cannot say).
func (j *RedisJournal) hasBody(ctx context.Context, team, run string, raw []byte) bool {
	key := j.keys(team, run)[4]
	n, err := j.c.HExists(ctx, key, string(raw)).Result()
	if err != nil || n {
		return n
	}
	n, _ = j.c.HExists(ctx, key, string(chunkKey(raw, 0))).Result()
	return n
}
