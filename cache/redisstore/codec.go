package redisstore

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
)

// A stored value is a header and the payload:
//
//	[0] format version (1)   [1] flags (bit 0: payload is zstd)
//	[2:10] expiresAt, big-endian Unix ns (0: never)   [10:14] CRC-32C of the value
const (
	recordVersion = 1
	flagZstd      = 1
	headerLen     = 14
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

func (s *Store) encode(value []byte, expiresAt int64) []byte {
	rec := make([]byte, headerLen, headerLen+len(value))
	rec[0] = recordVersion
	binary.BigEndian.PutUint64(rec[2:], uint64(expiresAt))
	binary.BigEndian.PutUint32(rec[10:], crc32.Checksum(value, castagnoli))
	if s.compressMin >= 0 && len(value) >= s.compressMin {
		rec = s.enc.EncodeAll(value, rec)
		if len(rec)-headerLen < len(value) {
			rec[1] = flagZstd
			return rec
		}
		rec = rec[:headerLen]
	}
	return append(rec, value...)
}

// decode returns the value in rec (a fresh slice) and its expiry.
func (s *Store) decode(rec []byte) ([]byte, int64, error) {
	if len(rec) < headerLen || rec[0] != recordVersion || rec[1]&^flagZstd != 0 {
		return nil, 0, fmt.Errorf("%w: bad header", ErrCorrupt)
	}
	exp := int64(binary.BigEndian.Uint64(rec[2:]))
	value := rec[headerLen:] // rec is go-redis's fresh copy of the reply
	if rec[1]&flagZstd != 0 {
		var err error
		if value, err = s.dec.DecodeAll(value, nil); err != nil {
			return nil, 0, fmt.Errorf("%w: %w", ErrCorrupt, err)
		}
	}
	if crc32.Checksum(value, castagnoli) != binary.BigEndian.Uint32(rec[10:]) {
		return nil, 0, fmt.Errorf("%w: checksum mismatch", ErrCorrupt)
	}
	return value, exp, nil
}

func isEOF(err error) bool { return errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) }
