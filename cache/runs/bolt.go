package runs

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"time"

	"go.etcd.io/bbolt"
)

// Bucket layout, inside the top-level bucket "stint.runs.v1":
//
//	<team>/<run>/                  one bucket per team, one per run in it
//	  tally      the run's summary figures (encodeTally)
//	  e/         Seq (8 bytes, big-endian) -> record (encodeRecord)
//	  o/         key -> occurrences recorded (8 bytes, big-endian)
//	  x/         key + occurrence (8 bytes) -> Seq (8 bytes)
//	  b/         ref (32 raw bytes) -> body
var (
	topBucket     = []byte("stint.runs.v1")
	tallyKey      = []byte("tally")
	entriesBucket = []byte("e")
	occBucket     = []byte("o")
	indexBucket   = []byte("x")
	bodiesBucket  = []byte("b")
)

// BoltJournal is a Journal in a bbolt database that it shares with others
// (the proxy keeps its cache and ledger in the same file): it touches only
// the top-level bucket "stint.runs.v1". It is safe for concurrent use.
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
}

// BoltOptions configure a BoltJournal; the zero value is usable.
type BoltOptions struct {
	// Update, when set, runs Record's write transactions, for example a
	// cache/boltgroup Committer shared with the file's other writers. Its
	// functions may run more than once. Nil means db.Batch.
	Update func(func(*bbolt.Tx) error) error
}

var _ Journal = (*BoltJournal)(nil)

// NewBolt returns a BoltJournal on an open db, creating its bucket. The
// caller keeps ownership of db and closes it after the journal's last use.
// A file opened with bbolt's NoSync loses Record's durability.
func NewBolt(db *bbolt.DB, opts BoltOptions) (*BoltJournal, error) {
	if db == nil {
		return nil, errors.New("runs: NewBolt: nil *bbolt.DB")
	}
	err := db.Update(func(tx *bbolt.Tx) error {
		_, err := tx.CreateBucketIfNotExists(topBucket)
		return err
	})
	if err != nil {
		return nil, fmt.Errorf("runs: create bucket %s: %w", topBucket, err)
	}
	write := opts.Update
	if write == nil {
		write = db.Batch
	}
	return &BoltJournal{db: db, write: write}, nil
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

// deleteRun removes team's run, and the team's bucket once it is empty.
func deleteRun(tx *bbolt.Tx, team, run string) error {
	tb := tx.Bucket(topBucket).Bucket([]byte(team))
	if err := tb.DeleteBucket([]byte(run)); err != nil {
		return err
	}
	if k, _ := tb.Cursor().First(); k == nil {
		return tx.Bucket(topBucket).DeleteBucket([]byte(team))
	}
	return nil
}

func (b *runBuckets) tally() (tally, error) {
	return decodeTally(b.run.Get(tallyKey))
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
	v := b.bodies.Get(raw)
	if v == nil {
		return nil, fmt.Errorf("%w: body %.16s… is missing", ErrCorrupt, ref)
	}
	return append([]byte{}, v...), nil
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
		var t tally
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
		newBody := b.bodies.Get(raw) == nil
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
