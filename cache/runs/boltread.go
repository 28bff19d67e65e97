package runs

import (
	"bytes"
	"context"
	"encoding/binary"
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
		if _, err := existingRun(tx, team, run); err != nil {
			return err
		}
		return deleteRun(tx, team, run)
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
				if v := b.bodies.Get(raw); v != nil {
					s.sizes[r.Ref] = int64(len(v))
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

// body implements source.
func (j *BoltJournal) body(ctx context.Context, team, run, ref string) ([]byte, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	var body []byte
	err := j.db.View(func(tx *bbolt.Tx) error {
		b, err := openRun(tx, team, run)
		if err != nil {
			return err
		}
		if b == nil {
			return fmt.Errorf("%w: run %q was deleted during the export", ErrNotFound, run)
		}
		body, err = b.body(ref)
		return err
	})
	return body, err
}

// store implements sink, in one write transaction.
func (j *BoltJournal) store(ctx context.Context, team, run string, a *archive, replace bool) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	err := j.db.Update(func(tx *bbolt.Tx) error {
		b, err := openRun(tx, team, run)
		if err != nil {
			return err
		}
		if b != nil {
			if !replace {
				return fmt.Errorf("%w: team already has run %q", ErrExists, run)
			}
			if err := deleteRun(tx, team, run); err != nil {
				return err
			}
		}
		if b, err = createRun(tx, team, run); err != nil {
			return err
		}
		b.entries.FillPercent = 1 // appended in key order
		for _, ref := range a.order {
			raw, _ := rawRef(ref)
			if err := b.bodies.Put(raw, a.bodies[ref]); err != nil {
				return err
			}
		}
		for i := range a.recs {
			r := &a.recs[i]
			v, err := encodeRecord(r)
			if err != nil {
				return err
			}
			if err := b.putEntry(r, v); err != nil {
				return err
			}
		}
		return b.run.Put(tallyKey, encodeTally(&a.tally))
	})
	if err != nil {
		return fmt.Errorf("runs: import %q: %w", run, err)
	}
	return nil
}
