package runs

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"sync"
	"time"

	"go.etcd.io/bbolt"
)

// Bucket layout, inside the top-level bucket "stint.runs.v1":
//
//	<team>/                        one bucket per team
//	  #usage     what the team's runs hold (8 bytes, big-endian; see Usage)
//	  #import-<hex>/<run>/         a run being imported, moved into place
//	                               when the import commits (none survive a
//	                               restart: NewBolt removes them)
//	  <run>/                       one bucket per run
//	    tally    the run's summary figures (encodeTally)
//	    e/       Seq (8 bytes, big-endian) -> record (encodeRecord)
//	    o/       key -> occurrences recorded (8 bytes, big-endian)
//	    x/       key + occurrence (8 bytes) -> Seq (8 bytes)
//	    b/       ref (32 raw bytes) -> body, or for a body longer than
//	             bodyChunk that Import wrote, ref + chunk number (4 bytes,
//	             big-endian, from 0) -> that chunk
//
// Names that start with '#' are not run ids (ValidID), so they never meet
// a run's.
var (
	topBucket     = []byte("stint.runs.v1")
	tallyKey      = []byte("tally")
	entriesBucket = []byte("e")
	occBucket     = []byte("o")
	indexBucket   = []byte("x")
	bodiesBucket  = []byte("b")
	usageKey      = []byte("#usage")
	stagePrefix   = []byte("#import-")
)

// bodyChunk is the size of the chunks Import writes a long body in, so that
// no body is held whole while it is imported.
const bodyChunk = 1 << 20

// BoltJournal is a Journal in a bbolt database that it shares with others
// (the proxy keeps its cache and ledger in the same file): it touches only
// the top-level bucket "stint.runs.v1". It is safe for concurrent use. The
// quota of imports in progress is reserved in this process, which alone
// holds the file.
//
// Record writes through BoltOptions.Update when set (a group committer
// shared with the file's other writers: concurrent recorders share one
// commit and one fsync, a lone one commits at once), else through
// db.Batch (a lone recorder waits up to db.MaxBatchDelay for company). Reads
// run in parallel in read transactions, and no read transaction is held
// while a caller's function runs or while Export writes.
type BoltJournal struct {
	db    *bbolt.DB
	write func(func(*bbolt.Tx) error) error // Record's write transaction
	quota int64                             // <= 0: none

	mu    sync.Mutex       // guards holds
	holds map[string]int64 // by team: bytes reserved by imports in progress
}

// BoltOptions configure a BoltJournal; the zero value is usable.
type BoltOptions struct {
	// Update, when set, runs Record's write transactions, for example a
	// cache/boltgroup Committer shared with the file's other writers. Its
	// functions may run more than once. Nil means db.Batch.
	Update func(func(*bbolt.Tx) error) error
	// QuotaBytes bounds what each team's runs may hold (see Usage). 0
	// means DefaultQuotaBytes; -1 means no quota.
	QuotaBytes int64
}

var _ Journal = (*BoltJournal)(nil)

// NewBolt returns a BoltJournal on an open db, creating its bucket and
// removing what imports that never committed left (a process that stopped
// mid-import), so open one journal per file, before any Import on it. The
// caller keeps ownership of db and closes it after the journal's last use.
// A file opened with bbolt's NoSync loses Record's durability.
func NewBolt(db *bbolt.DB, opts BoltOptions) (*BoltJournal, error) {
	if db == nil {
		return nil, errors.New("runs: NewBolt: nil *bbolt.DB")
	}
	err := db.Update(func(tx *bbolt.Tx) error {
		top, err := tx.CreateBucketIfNotExists(topBucket)
		if err != nil {
			return err
		}
		return dropStaging(top)
	})
	if err != nil {
		return nil, fmt.Errorf("runs: create bucket %s: %w", topBucket, err)
	}
	write := opts.Update
	if write == nil {
		write = db.Batch
	}
	return &BoltJournal{db: db, write: write, quota: quotaOf(opts.QuotaBytes), holds: map[string]int64{}}, nil
}

// quotaOf resolves a QuotaBytes option: 0 is the default, negative none.
func quotaOf(q int64) int64 {
	switch {
	case q == 0:
		return DefaultQuotaBytes
	case q < 0:
		return 0
	}
	return q
}

// dropStaging removes the runs of imports that never committed (the
// process stopped mid-import).
func dropStaging(top *bbolt.Bucket) error {
	var teams [][]byte
	if err := top.ForEachBucket(func(name []byte) error {
		teams = append(teams, bytes.Clone(name))
		return nil
	}); err != nil {
		return err
	}
	for _, team := range teams {
		tb := top.Bucket(team)
		var stale [][]byte
		if err := tb.ForEachBucket(func(name []byte) error {
			if bytes.HasPrefix(name, stagePrefix) {
				stale = append(stale, bytes.Clone(name))
			}
			return nil
		}); err != nil {
			return err
		}
		for _, name := range stale {
			if err := tb.DeleteBucket(name); err != nil {
				return err
			}
		}
	}
	return nil
}

// runBuckets are the buckets of one run.
type runBuckets struct {
	run, entries, occ, index, bodies *bbolt.Bucket
}

// openRun returns the buckets of team's run, or nil if it does not exist.
func openRun(tx *bbolt.Tx, team, run string) (*runBuckets, error) {
	top := tx.Bucket(topBucket)
	if top == nil {
		return nil, fmt.Errorf("%w: bucket %s is missing", ErrCorrupt, topBucket)
	}
	tb := top.Bucket([]byte(team))
	if tb == nil {
		return nil, nil
	}
	rb := tb.Bucket([]byte(run))
	if rb == nil {
		return nil, nil
	}
	b := &runBuckets{run: rb, entries: rb.Bucket(entriesBucket), occ: rb.Bucket(occBucket),
		index: rb.Bucket(indexBucket), bodies: rb.Bucket(bodiesBucket)}
	if b.entries == nil || b.occ == nil || b.index == nil || b.bodies == nil {
		return nil, fmt.Errorf("%w: run %q lacks one of its buckets", ErrCorrupt, run)
	}
	return b, nil
}

// putEntry stores an encoded entry with its occurrence count and index.
func (b *runBuckets) putEntry(r *record, encoded []byte) error {
	if err := b.entries.Put(u64(r.Seq), encoded); err != nil {
		return err
	}
	if err := b.occ.Put([]byte(r.Key), u64(r.Occurrence)); err != nil {
		return err
	}
	return b.index.Put(indexKey(r.Key, r.Occurrence), u64(r.Seq))
}

// existingRun opens team's run, failing with ErrNotFound when the team has
// none by that id.
func existingRun(tx *bbolt.Tx, team, run string) (*runBuckets, error) {
	b, err := openRun(tx, team, run)
	if err == nil && b == nil {
		err = fmt.Errorf("%w: team has no run %q", ErrNotFound, run)
	}
	return b, err
}

// createRun creates team's run, which must not exist, with its buckets.
func createRun(tx *bbolt.Tx, team, run string) (*runBuckets, error) {
	tb, err := tx.Bucket(topBucket).CreateBucketIfNotExists([]byte(team))
	if err != nil {
		return nil, err
	}
	rb, err := tb.CreateBucket([]byte(run))
	if err != nil {
		return nil, err
	}
	b := &runBuckets{run: rb}
	for _, p := range [...]struct {
		name []byte
		b    **bbolt.Bucket
	}{{entriesBucket, &b.entries}, {occBucket, &b.occ}, {indexBucket, &b.index}, {bodiesBucket, &b.bodies}} {
		if *p.b, err = rb.CreateBucket(p.name); err != nil {
			return nil, err
		}
	}
	return b, nil
}

// deleteRun removes team's run, and the team's bucket once it holds no
// run (nor an import in progress).
func deleteRun(tx *bbolt.Tx, team, run string) error {
	tb := tx.Bucket(topBucket).Bucket([]byte(team))
	if err := tb.DeleteBucket([]byte(run)); err != nil {
		return err
	}
	empty := true
	if err := tb.ForEachBucket(func([]byte) error { empty = false; return nil }); err != nil {
		return err
	}
	if empty {
		return tx.Bucket(topBucket).DeleteBucket([]byte(team))
	}
	return nil
}

func (b *runBuckets) tally() (tally, error) {
	return runTally(b.run)
}

// runTally reads the tally of the run bucket rb, counting Stored from its
// entries when the run was written before Stored was kept.
func runTally(rb *bbolt.Bucket) (tally, error) {
	t, err := decodeTally(rb.Get(tallyKey))
	if err != nil || t.Stored >= 0 {
		return t, err
	}
	entries := rb.Bucket(entriesBucket)
	if entries == nil {
		return tally{}, fmt.Errorf("%w: a run lacks its entries", ErrCorrupt)
	}
	t.Stored = t.Bytes
	err = entries.ForEach(func(_, v []byte) error {
		r, err := decodeRecord(v)
		if err == nil {
			t.Stored += entryBytes(&r)
		}
		return err
	})
	return t, err
}

// teamUsage is what team's runs hold: its counter, or for a team recorded
// before the counter was kept, the sum over its runs.
func teamUsage(tx *bbolt.Tx, team string) (int64, error) {
	tb := tx.Bucket(topBucket).Bucket([]byte(team))
	if tb == nil {
		return 0, nil
	}
	if v := tb.Get(usageKey); v != nil {
		if len(v) != 8 {
			return 0, fmt.Errorf("%w: usage counter of %d bytes", ErrCorrupt, len(v))
		}
		return int64(binary.BigEndian.Uint64(v)), nil
	}
	var sum int64
	err := tb.ForEachBucket(func(name []byte) error {
		if ValidID(string(name)) != nil {
			return nil // an import in progress
		}
		t, err := runTally(tb.Bucket(name))
		sum += t.Stored
		return err
	})
	return sum, err
}

// setTeamUsage sets team's counter; the team's bucket must exist.
func setTeamUsage(tx *bbolt.Tx, team string, v int64) error {
	return tx.Bucket(topBucket).Bucket([]byte(team)).Put(usageKey, u64(max(v, 0)))
}

// held is what imports in progress reserve of team's quota.
func (j *BoltJournal) held(team string) int64 {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.holds[team]
}

// checkQuota fails with a *QuotaError if adding need bytes to used (the
// team's runs) and held (imports in progress) passes the quota.
func checkQuota(quota int64, team string, used, held, need int64) error {
	if quota > 0 && need > 0 && used+held+need > quota {
		return &QuotaError{Team: team, Used: used + held, Need: need, Quota: quota}
	}
	return nil
}

func (b *runBuckets) count(key string) (int64, error) {
	v := b.occ.Get([]byte(key))
	if v == nil {
		return 0, nil
	}
	if len(v) != 8 {
		return 0, fmt.Errorf("%w: occurrence counter of %d bytes", ErrCorrupt, len(v))
	}
	return int64(binary.BigEndian.Uint64(v)), nil
}

// record reads the entry at seq.
func (b *runBuckets) record(seq []byte) (record, error) {
	v := b.entries.Get(seq)
	if v == nil {
		return record{}, fmt.Errorf("%w: entry %x is missing", ErrCorrupt, seq)
	}
	r, err := decodeRecord(v)
	if err == nil && !bytes.Equal(u64(r.Seq), seq) {
		err = fmt.Errorf("%w: entry %x holds seq %d", ErrCorrupt, seq, r.Seq)
	}
	return r, err
}

// body copies the body of ref out of the transaction.
func (b *runBuckets) body(ref string) ([]byte, error) {
	raw, err := rawRef(ref)
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrCorrupt, err)
	}
	var body []byte
	n, err := b.bodyPieces(raw, func(p []byte) error {
		body = append(body, p...)
		return nil
	})
	if err == nil && n == 0 {
		err = fmt.Errorf("%w: body %.16s… is missing", ErrCorrupt, ref)
	}
	if body == nil {
		body = []byte{}
	}
	return body, err
}

// bodyPieces calls fn with the body of raw: whole, or chunk by chunk. It
// returns how many pieces there were (0: no such body). The slices are
// valid only inside the transaction.
func (b *runBuckets) bodyPieces(raw []byte, fn func([]byte) error) (int, error) {
	c := b.bodies.Cursor()
	k, v := c.Seek(raw)
	if bytes.Equal(k, raw) {
		return 1, fn(v)
	}
	n := 0
	for ; len(k) == len(raw)+4 && bytes.HasPrefix(k, raw); k, v = c.Next() {
		if binary.BigEndian.Uint32(k[len(raw):]) != uint32(n) {
			return n, fmt.Errorf("%w: body %x lacks chunk %d", ErrCorrupt, raw[:8], n)
		}
		if err := fn(v); err != nil {
			return n, err
		}
		n++
	}
	return n, nil
}

// hasBody reports whether the run holds the body of raw, whole or chunked.
func (b *runBuckets) hasBody(raw []byte) bool {
	k, _ := b.bodies.Cursor().Seek(raw)
	return bytes.HasPrefix(k, raw) && (len(k) == len(raw) || len(k) == len(raw)+4)
}

// bodySize is the length of the body of raw, or -1 if the run lacks it.
func (b *runBuckets) bodySize(raw []byte) int64 {
	var size int64
	n, err := b.bodyPieces(raw, func(p []byte) error { size += int64(len(p)); return nil })
	if err != nil || n == 0 {
		return -1
	}
	return size
}

// chunkKey is the key of chunk i of the body of raw.
func chunkKey(raw []byte, i uint32) []byte {
	return binary.BigEndian.AppendUint32(bytes.Clone(raw), i)
}

func u64(v int64) []byte { return binary.BigEndian.AppendUint64(nil, uint64(v)) }

func indexKey(key string, occ int64) []byte {
	return binary.BigEndian.AppendUint64([]byte(key), uint64(occ))
}

// Record implements Journal.
func (j *BoltJournal) Record(ctx context.Context, team, run string, e Entry, a Answer) (Entry, error) {
	if err := validScope(team, run); err != nil {
		return Entry{}, err
	}
	r, err := newRecord(e, a, time.Now)
	if err != nil {
		return Entry{}, err
	}
	raw, _ := rawRef(r.Ref)
	if err := ctx.Err(); err != nil {
		return Entry{}, err
	}
	var out record
	// The write may run the function more than once; it recomputes
	// everything from the transaction each time.
	err = j.write(func(tx *bbolt.Tx) error {
		b, err := openRun(tx, team, run)
		if err != nil {
			return err
		}
		used, err := teamUsage(tx, team)
		if err != nil {
			return err
		}
		var t tally
		newBody := b == nil || !b.hasBody(raw)
		if err := checkQuota(j.quota, team, used, j.held(team), r.stored(newBody, len(a.Body))); err != nil {
			return err
		}
		if b == nil {
			if b, err = createRun(tx, team, run); err != nil {
				return err
			}
		} else if t, err = b.tally(); err != nil {
			return err
		}
		n, err := b.count(r.Key)
		if err != nil {
			return err
		}
		rec := r
		rec.Seq, rec.Occurrence = t.Calls+1, n+1
		if newBody {
			if err := b.bodies.Put(raw, a.Body); err != nil {
				return err
			}
		}
		v, err := encodeRecord(&rec)
		if err != nil {
			return err
		}
		t.add(&rec, n == 0, newBody, len(a.Body))
		if err := b.putEntry(&rec, v); err != nil {
			return err
		}
		if err := b.run.Put(tallyKey, encodeTally(&t)); err != nil {
			return err
		}
		if err := setTeamUsage(tx, team, used+rec.stored(newBody, len(a.Body))); err != nil {
			return err
		}
		out = rec
		return nil
	})
	if err != nil {
		return Entry{}, fmt.Errorf("runs: record into %q: %w", run, err)
	}
	return out.Entry, nil
}

// Lookup implements Journal.
func (j *BoltJournal) Lookup(ctx context.Context, team, run, key string, occurrence int64) (Entry, Answer, error) {
	if err := validScope(team, run); err != nil {
		return Entry{}, Answer{}, err
	}
	if err := validKey(key); err != nil {
		return Entry{}, Answer{}, err
	}
	if err := ctx.Err(); err != nil {
		return Entry{}, Answer{}, err
	}
	var (
		rec  record
		body []byte
	)
	err := j.db.View(func(tx *bbolt.Tx) error {
		b, err := existingRun(tx, team, run)
		if err != nil {
			return err
		}
		seq := b.index.Get(indexKey(key, occurrence))
		if seq == nil {
			have, err := b.count(key)
			if err != nil {
				return err
			}
			return &MissError{Run: run, Key: key, Occurrence: occurrence, Have: have}
		}
		if rec, err = b.record(seq); err != nil {
			return err
		}
		if rec.Key != key || rec.Occurrence != occurrence {
			return fmt.Errorf("%w: index of %q points at entry %d of another call", ErrCorrupt, run, rec.Seq)
		}
		body, err = b.body(rec.Ref)
		return err
	})
	if err == nil {
		err = checkBody(rec.Ref, body)
	}
	if err != nil {
		return Entry{}, Answer{}, lookupErr(run, err)
	}
	return rec.Entry, rec.answer(body), nil
}

// lookupErr wraps err unless it is a *MissError, which stays as it is.
func lookupErr(run string, err error) error {
	var miss *MissError
	if errors.As(err, &miss) {
		return miss
	}
	return fmt.Errorf("runs: lookup in %q: %w", run, err)
}

// Count implements Journal.
func (j *BoltJournal) Count(ctx context.Context, team, run, key string) (int64, error) {
	if err := validScope(team, run); err != nil {
		return 0, err
	}
	if err := validKey(key); err != nil {
		return 0, err
	}
	if err := ctx.Err(); err != nil {
		return 0, err
	}
	var n int64
	err := j.db.View(func(tx *bbolt.Tx) error {
		b, err := openRun(tx, team, run)
		if err != nil || b == nil {
			return err
		}
		n, err = b.count(key)
		return err
	})
	if err != nil {
		return 0, fmt.Errorf("runs: count in %q: %w", run, err)
	}
	return n, nil
}

// Export implements Journal.
func (j *BoltJournal) Export(ctx context.Context, team, run string, w io.Writer) error {
	return export(ctx, j, team, run, w, time.Now())
}

// Import implements Journal.
func (j *BoltJournal) Import(ctx context.Context, team string, r io.Reader, opts ImportOptions) (Summary, error) {
	return importRun(ctx, j, team, r, opts)
}

// Usage implements Journal.
func (j *BoltJournal) Usage(ctx context.Context, team string) (Usage, error) {
	if err := validTeam(team); err != nil {
		return Usage{}, err
	}
	if err := ctx.Err(); err != nil {
		return Usage{}, err
	}
	u := Usage{QuotaBytes: j.quota}
	err := j.db.View(func(tx *bbolt.Tx) error {
		var err error
		u.Bytes, err = teamUsage(tx, team)
		return err
	})
	if err != nil {
		return Usage{}, fmt.Errorf("runs: usage: %w", err)
	}
	return u, nil
}
