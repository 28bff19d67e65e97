package redisstore

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"

	"github.com/klauspost/compress/s2"
)

// A stored value is a header and the payload:
//
//	[0] format version (1)   [1] flags (bit 1: payload is S2)
//	[2:10] expiresAt, big-endian Unix ns (0: never)   [10:14] CRC-32C of the value
const (
	recordVersion = 1
	flagS2        = 2
	maxDecoded    = 1 << 31
	headerLen     = 14
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

func (s *Store) encode(value []byte, expiresAt int64) []byte {
	rec := make([]byte, headerLen, headerLen+len(value))
	rec[0] = recordVersion
	binary.BigEndian.PutUint64(rec[2:], uint64(expiresAt))
	binary.BigEndian.PutUint32(rec[10:], crc32.Checksum(value, castagnoli))
	if s.compressMin >= 0 && len(value) >= s.compressMin {
		buf := make([]byte, headerLen+s2.MaxEncodedLen(len(value)))
		copy(buf, rec)
		if enc := s2.Encode(buf[headerLen:], value); len(enc) < len(value) {
			buf[1] = flagS2
			return buf[:headerLen+len(enc)]
		}
	}
	return append(rec, value...)
}

// decode returns the value in rec (a fresh slice) and its expiry.
func (s *Store) decode(rec []byte) ([]byte, int64, error) {
	if len(rec) < headerLen || rec[0] != recordVersion || rec[1]&^flagS2 != 0 {
		return nil, 0, fmt.Errorf("%w: bad header", ErrCorrupt)
	}
	exp := int64(binary.BigEndian.Uint64(rec[2:]))
	value := rec[headerLen:] // rec is go-redis's fresh copy of the reply
	if rec[1]&flagS2 != 0 {
		n, err := s2.DecodedLen(value)
		if err != nil || n > maxDecoded {
			return nil, 0, fmt.Errorf("%w: S2 payload of %d bytes: %v", ErrCorrupt, n, err)
		}
		if value, err = s2.Decode(make([]byte, n), value); err != nil {
			return nil, 0, fmt.Errorf("%w: %w", ErrCorrupt, err)
		}
	}
	if crc32.Checksum(value, castagnoli) != binary.BigEndian.Uint32(rec[10:]) {
		return nil, 0, fmt.Errorf("%w: checksum mismatch", ErrCorrupt)
	}
	return value, exp, nil
}

func isEOF(err error) bool { return errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) }
