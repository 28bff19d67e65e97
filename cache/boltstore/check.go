package boltstore

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"

	"go.etcd.io/bbolt"
)

// Check verifies the whole store in one read transaction: bbolt's own page
// consistency check of the file, then that every entry decodes and matches
// its checksum, that both indexes hold exactly the entries they should, and
// that the totals match. It reads everything, so it is meant for tests and
// repair tools, not for the request path. Problems are joined into one error
// that wraps ErrCorrupt.
func (s *Store) Check(ctx context.Context) error {
	if err := s.enter(ctx); err != nil {
		return err
	}
	defer s.mu.RUnlock()
	var problems []error
	add := func(format string, args ...any) {
		if len(problems) < 20 {
			problems = append(problems, fmt.Errorf(format, args...))
		}
	}
	err := s.view(func(tx *bbolt.Tx) error {
		for err := range tx.Check() {
			add("bbolt: %w", err)
		}
		top := tx.Bucket(topBucket)
		if top == nil {
			add("bucket %s missing", topBucket)
			return nil
		}
		entries, stored, expires, meta := top.Bucket(entriesBucket), top.Bucket(storedBucket), top.Bucket(expiresBucket), top.Bucket(metaBucket)
		if entries == nil || stored == nil || expires == nil || meta == nil {
			add("a bucket inside %s is missing", topBucket)
			return nil
		}
		var bytes, count, withTTL int64
		err := entries.ForEach(func(k, rec []byte) error {
			if err := ctx.Err(); err != nil {
				return err
			}
			count++
			bytes += int64(len(k) + len(rec))
			h, err := parseHeader(rec)
			if err != nil {
				add("entry %.16q: %w", k, err)
				return nil
			}
			if _, err := s.decode(h, rec[headerLen:]); err != nil {
				add("entry %.16q: %w", k, err)
			}
			if stored.Get(indexKey(h.storedAt, k)) == nil {
				add("entry %.16q missing from the stored-at index", k)
			}
			if h.expiresAt != 0 {
				withTTL++
				if expires.Get(indexKey(h.expiresAt, k)) == nil {
					add("entry %.16q missing from the expiry index", k)
				}
			}
			return nil
		})
		if err != nil {
			return err
		}
		checkIndex := func(name string, b *bbolt.Bucket, field func(header) int64) int64 {
			var n int64
			_ = b.ForEach(func(k, _ []byte) error {
				n++
				if len(k) < 8 {
					add("%s index: short key", name)
					return nil
				}
				rec := entries.Get(k[8:])
				if rec == nil {
					add("%s index: %.16q has no entry", name, k[8:])
					return nil
				}
				if h, err := parseHeader(rec); err == nil && field(h) != int64(binary.BigEndian.Uint64(k)) {
					add("%s index: %.16q has a stale time", name, k[8:])
				}
				return nil
			})
			return n
		}
		if n := checkIndex("stored-at", stored, func(h header) int64 { return h.storedAt }); n != count {
			add("stored-at index has %d keys for %d entries", n, count)
		}
		if n := checkIndex("expiry", expires, func(h header) int64 { return h.expiresAt }); n != withTTL {
			add("expiry index has %d keys for %d entries with a TTL", n, withTTL)
		}
		if got := getInt(meta, bytesKey); got != bytes {
			add("total bytes recorded %d, entries hold %d", got, bytes)
		}
		if got := getInt(meta, countKey); got != count {
			add("entry count recorded %d, entries number %d", got, count)
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("boltstore: check: %w", err)
	}
	if len(problems) > 0 {
		return fmt.Errorf("%w: %w", ErrCorrupt, errors.Join(problems...))
	}
	return nil
}
