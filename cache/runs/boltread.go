package runs

import (
	"bytes"
	"context"
	"crypto/rand"
	"encoding/binary"
	"encoding/hex"
	"fmt"

	"go.etcd.io/bbolt"
)

// entriesChunk is how many entries Entries reads per read transaction.
const entriesChunk = 1024

// Summary implements Journal.
func (j *BoltJournal) Summary(ctx context.Context, team, run string) (Summary, error) {
	if err := validScope(team, run); err != nil {
		return Summary{}, err
	}
	if err := ctx.Err(); err != nil {
		return Summary{}, err
	}
	var t tally
	err := j.db.View(func(tx *bbolt.Tx) error {
		b, err := existingRun(tx, team, run)
		if err != nil {
			return err
		}
		t, err = b.tally()
		return err
	})
	if err != nil {
		return Summary{}, fmt.Errorf("runs: summary of %q: %w", run, err)
	}
	return t.summary(team, run), nil
}

// List implements Journal.
func (j *BoltJournal) List(ctx context.Context, team string) ([]Summary, error) {
	if err := validTeam(team); err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	var list []Summary
	err := j.db.View(func(tx *bbolt.Tx) error {
		top := tx.Bucket(topBucket)
		if top == nil {
			return fmt.Errorf("%w: bucket %s is missing", ErrCorrupt, topBucket)
		}
		tb := top.Bucket([]byte(team))
		if tb == nil {
			return nil
		}
		return tb.ForEachBucket(func(name []byte) error {
			if err := ctx.Err(); err != nil {
				return err
			}
			if ValidID(string(name)) != nil {
				return nil // an import in progress
			}
			t, err := decodeTally(tb.Bucket(name).Get(tallyKey))
			if err != nil {
				return fmt.Errorf("run %q: %w", name, err)
			}
			list = append(list, t.summary(team, string(name)))
			return nil
		})
	})
	if err != nil {
		return nil, fmt.Errorf("runs: list: %w", err)
	}
	sortSummaries(list)
	return list, nil
}

// Entries implements Journal.
func (j *BoltJournal) Entries(ctx context.Context, team, run string, fn func(Entry) error) error {
	if err := validScope(team, run); err != nil {
		return err
	}
	var last int64 = -1 // the run's last Seq when Entries started
	for next := int64(1); last < 0 || next <= last; {
		if err := ctx.Err(); err != nil {
			return err
		}
		var chunk []record
		err := j.db.View(func(tx *bbolt.Tx) error {
			b, err := openRun(tx, team, run)
			if err != nil {
				return err
			}
			if b == nil {
				if last < 0 {
					return fmt.Errorf("%w: team has no run %q", ErrNotFound, run)
				}
				return fmt.Errorf("%w: run %q was deleted during Entries", ErrNotFound, run)
			}
			if last < 0 {
				t, err := b.tally()
				if err != nil {
					return err
				}
				last = t.Calls
			}
			c := b.entries.Cursor()
			for k, v := c.Seek(u64(next)); k != nil && len(chunk) < entriesChunk; k, v = c.Next() {
				if len(k) != 8 {
					return fmt.Errorf("%w: entry key %x", ErrCorrupt, k)
				}
				if seq := int64(binary.BigEndian.Uint64(k)); seq > last {
					break
				} else if seq != next {
					return fmt.Errorf("%w: entry %d is missing", ErrCorrupt, next)
				}
				r, err := decodeRecord(v)
				if err != nil {
					return err
				}
				if r.Seq != next {
					return fmt.Errorf("%w: entry %d holds seq %d", ErrCorrupt, next, r.Seq)
				}
				chunk = append(chunk, r)
				next++
			}
			if len(chunk) == 0 && next <= last {
				return fmt.Errorf("%w: entry %d is missing", ErrCorrupt, next)
			}
			return nil
		})
		if err != nil {
			return fmt.Errorf("runs: entries of %q: %w", run, err)
		}
		for i := range chunk {
			if err := fn(chunk[i].Entry); err != nil {
				return err
			}
		}
	}
	return nil
}

// Delete implements Journal.
func (j *BoltJournal) Delete(ctx context.Context, team, run string) error {
	if err := validScope(team, run); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	err := j.db.Update(func(tx *bbolt.Tx) error {
		b, err := existingRun(tx, team, run)
		if err != nil {
			return err
		}
		t, err := b.tally()
		if err != nil {
			return err
		}
		used, err := teamUsage(tx, team)
		if err != nil {
			return err
		}
		if err := deleteRun(tx, team, run); err != nil {
			return err
		}
		if tx.Bucket(topBucket).Bucket([]byte(team)) == nil {
			return nil // the team's last run
		}
		return setTeamUsage(tx, team, used-t.Stored)
	})
	if err != nil {
		return fmt.Errorf("runs: delete %q: %w", run, err)
	}
	return nil
}

// snapshot implements source, in one read transaction.
func (j *BoltJournal) snapshot(ctx context.Context, team, run string) (*snapshot, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	s := &snapshot{sizes: map[string]int64{}}
	err := j.db.View(func(tx *bbolt.Tx) error {
		b, err := existingRun(tx, team, run)
		if err != nil {
			return err
		}
		t, err := b.tally()
		if err != nil {
			return err
		}
		s.recs = make([]record, 0, t.Calls)
		c := b.entries.Cursor()
		for k, v := c.First(); k != nil; k, v = c.Next() {
			r, err := decodeRecord(v)
			if err != nil {
				return err
			}
			if r.Seq != int64(len(s.recs))+1 || !bytes.Equal(k, u64(r.Seq)) {
				return fmt.Errorf("%w: entry %d is out of place", ErrCorrupt, r.Seq)
			}
			s.recs = append(s.recs, r)
			if _, ok := s.sizes[r.Ref]; !ok {
				raw, _ := rawRef(r.Ref)
				if n := b.bodySize(raw); n >= 0 {
					s.sizes[r.Ref] = n
				}
			}
		}
		if int64(len(s.recs)) != t.Calls {
			return fmt.Errorf("%w: %d entries, the summary counts %d", ErrCorrupt, len(s.recs), t.Calls)
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("runs: export %q: %w", run, err)
	}
	return s, nil
}

// body implements source: a body recorded whole in one read transaction,
// one imported in chunks a chunk per transaction.
func (j *BoltJournal) body(ctx context.Context, team, run, ref string, fn func([]byte) error) error {
	raw, err := rawRef(ref)
	if err != nil {
		return fmt.Errorf("%w: %w", ErrCorrupt, err)
	}
	for i := 0; ; i++ {
		if err := ctx.Err(); err != nil {
			return err
		}
		var (
			piece []byte
			last  bool
		)
		err := j.db.View(func(tx *bbolt.Tx) error {
			b, err := openRun(tx, team, run)
			if err != nil {
				return err
			}
			if b == nil {
				return fmt.Errorf("%w: run %q was deleted during the export", ErrNotFound, run)
			}
			if i == 0 {
				if v := b.bodies.Get(raw); v != nil {
					piece, last = bytes.Clone(v), true
					return nil
				}
			}
			v := b.bodies.Get(chunkKey(raw, uint32(i)))
			switch {
			case v == nil && i == 0:
				return fmt.Errorf("%w: body %.16s… is missing", ErrCorrupt, ref)
			case v == nil:
				last = true
			default:
				piece = bytes.Clone(v)
			}
			return nil
		})
		if err != nil {
			return err
		}
		if piece != nil {
			if err := fn(piece); err != nil {
				return err
			}
		}
		if last {
			return nil
		}
	}
}

// stage implements sink: it checks the team may import run and reserves
// need bytes of its quota for the import's duration (in this process,
// which alone holds the file).
func (j *BoltJournal) stage(ctx context.Context, team, run string, replace bool, need int64) (staging, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	var used, old int64
	err := j.db.View(func(tx *bbolt.Tx) error {
		b, err := openRun(tx, team, run)
		if err != nil {
			return err
		}
		if b != nil {
			if !replace {
				return fmt.Errorf("%w: team already has run %q", ErrExists, run)
			}
			t, err := b.tally()
			if err != nil {
				return err
			}
			old = t.Stored
		}
		used, err = teamUsage(tx, team)
		return err
	})
	if err != nil {
		return nil, fmt.Errorf("runs: import %q: %w", run, err)
	}
	j.mu.Lock()
	defer j.mu.Unlock()
	hold := max(need-old, 0)
	if err := checkQuota(j.quota, team, used, j.holds[team], hold); err != nil {
		return nil, fmt.Errorf("runs: import %q: %w", run, err)
	}
	j.holds[team] += hold
	var nonce [8]byte
	_, _ = rand.Read(nonce[:])
	return &boltStage{j: j, team: team, run: run, replace: replace, hold: hold,
		name: append(bytes.Clone(stagePrefix), hex.EncodeToString(nonce[:])...)}, nil
}

// boltPut is one write a boltStage has buffered.
type boltPut struct {
	bucket     int // index into stagedBuckets
	key, value []byte
}

// boltStage is a run being imported, written into the bucket
// <team>/#import-<nonce>/<run> in transactions of about stageBuffer bytes,
// and moved to <team>/<run> by commit.
type boltStage struct {
	j            *BoltJournal
	team, run    string
	replace      bool
	hold         int64
	name         []byte // the staging bucket under the team's
	staged       bool   // the staging bucket exists in the file
	pend         []boltPut
	pendBytes    int
	holdReleased bool
}

const (
	stagedEntries = iota
	stagedOcc
	stagedIndex
	stagedBodies
)

func (s *boltStage) add(bucket int, key, value []byte) {
	s.pend = append(s.pend, boltPut{bucket, key, value})
	s.pendBytes += len(key) + len(value)
}

func (s *boltStage) entries(ctx context.Context, recs []record) error {
	for i := range recs {
		r := &recs[i]
		v, err := encodeRecord(r)
		if err != nil {
			return err
		}
		s.add(stagedEntries, u64(r.Seq), v)
		s.add(stagedOcc, []byte(r.Key), u64(r.Occurrence))
		s.add(stagedIndex, indexKey(r.Key, r.Occurrence), u64(r.Seq))
	}
	return s.flushIfFull(ctx)
}

func (s *boltStage) body(ctx context.Context, raw []byte, chunk int, data []byte) error {
	key := bytes.Clone(raw)
	if chunk >= 0 {
		key = chunkKey(raw, uint32(chunk))
	}
	s.add(stagedBodies, key, data)
	return s.flushIfFull(ctx)
}

func (s *boltStage) flushIfFull(ctx context.Context) error {
	if s.pendBytes < stageBuffer {
		return nil
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	err := s.j.write(func(tx *bbolt.Tx) error {
		_, b, err := s.open(tx)
		if err != nil {
			return err
		}
		return s.apply(b)
	})
	if err != nil {
		return fmt.Errorf("runs: import %q: stage: %w", s.run, err)
	}
	s.staged, s.pend, s.pendBytes = true, nil, 0
	return nil
}

// open returns the staging buckets, creating them as needed: the one under
// the team's, and the run's in it.
func (s *boltStage) open(tx *bbolt.Tx) (*bbolt.Bucket, *runBuckets, error) {
	tb, err := tx.Bucket(topBucket).CreateBucketIfNotExists([]byte(s.team))
	if err != nil {
		return nil, nil, err
	}
	parent, err := tb.CreateBucketIfNotExists(s.name)
	if err != nil {
		return nil, nil, err
	}
	rb, err := parent.CreateBucketIfNotExists([]byte(s.run))
	if err != nil {
		return nil, nil, err
	}
	b := &runBuckets{run: rb}
	for _, p := range [...]struct {
		name []byte
		b    **bbolt.Bucket
	}{{entriesBucket, &b.entries}, {occBucket, &b.occ}, {indexBucket, &b.index}, {bodiesBucket, &b.bodies}} {
		if *p.b, err = rb.CreateBucketIfNotExists(p.name); err != nil {
			return nil, nil, err
		}
	}
	b.entries.FillPercent = 1 // appended in key order
	return parent, b, nil
}

// apply writes the buffered puts into b.
func (s *boltStage) apply(b *runBuckets) error {
	buckets := [...]*bbolt.Bucket{stagedEntries: b.entries, stagedOcc: b.occ, stagedIndex: b.index, stagedBodies: b.bodies}
	for _, p := range s.pend {
		if err := buckets[p.bucket].Put(p.key, p.value); err != nil {
			return err
		}
	}
	return nil
}

func (s *boltStage) commit(ctx context.Context, t *tally) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	// bbolt's MoveBucket loses what the moving transaction wrote into the
	// moved bucket, so a staged run is completed first, and moved alone.
	if s.staged {
		err := s.j.write(func(tx *bbolt.Tx) error {
			_, b, err := s.open(tx)
			if err == nil {
				err = s.apply(b)
			}
			if err == nil {
				err = b.run.Put(tallyKey, encodeTally(t))
			}
			return err
		})
		if err != nil {
			s.release()
			return fmt.Errorf("runs: import %q: stage: %w", s.run, err)
		}
		s.pend = nil
	}
	err := s.j.write(func(tx *bbolt.Tx) error {
		tb, err := tx.Bucket(topBucket).CreateBucketIfNotExists([]byte(s.team))
		if err != nil {
			return err
		}
		old, err := openRun(tx, s.team, s.run)
		if err != nil {
			return err
		}
		var freed int64
		if old != nil {
			if !s.replace {
				return fmt.Errorf("%w: team already has run %q", ErrExists, s.run)
			}
			ot, err := old.tally()
			if err != nil {
				return err
			}
			freed = ot.Stored
		}
		used, err := teamUsage(tx, s.team)
		if err != nil {
			return err
		}
		if err := checkQuota(s.j.quota, s.team, used-freed, s.j.held(s.team)-s.hold, t.Stored); err != nil {
			return err
		}
		if old != nil {
			if err := tb.DeleteBucket([]byte(s.run)); err != nil {
				return err
			}
		}
		if s.staged {
			if err := tx.MoveBucket([]byte(s.run), tb.Bucket(s.name), tb); err != nil {
				return err
			}
			if err := tb.DeleteBucket(s.name); err != nil {
				return err
			}
		} else {
			// Nothing was staged: the whole run goes in this one write.
			b, err := createRun(tx, s.team, s.run)
			if err != nil {
				return err
			}
			b.entries.FillPercent = 1 // appended in key order
			if err := s.apply(b); err != nil {
				return err
			}
			if err := b.run.Put(tallyKey, encodeTally(t)); err != nil {
				return err
			}
		}
		return setTeamUsage(tx, s.team, used-freed+t.Stored)
	})
	s.release()
	if err != nil {
		return fmt.Errorf("runs: import %q: %w", s.run, err)
	}
	s.staged, s.pend = false, nil
	return nil
}

func (s *boltStage) abort() {
	s.release()
	s.pend = nil
	if !s.staged {
		return
	}
	_ = s.j.write(func(tx *bbolt.Tx) error {
		tb := tx.Bucket(topBucket).Bucket([]byte(s.team))
		if tb == nil || tb.Bucket(s.name) == nil {
			return nil
		}
		if err := tb.DeleteBucket(s.name); err != nil {
			return err
		}
		empty := true
		if err := tb.ForEachBucket(func([]byte) error { empty = false; return nil }); err != nil {
			return err
		}
		if empty {
			return tx.Bucket(topBucket).DeleteBucket([]byte(s.team))
		}
		return nil
	})
}

// release gives back the quota the import reserved, once.
func (s *boltStage) release() {
	if s.holdReleased {
		return
	}
	s.holdReleased = true
	s.j.mu.Lock()
	defer s.j.mu.Unlock()
	if s.j.holds[s.team] -= s.hold; s.j.holds[s.team] <= 0 {
		delete(s.j.holds, s.team)
	}
}
