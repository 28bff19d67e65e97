package runs

import (
	"encoding/binary"
	"encoding/hex"
	"fmt"
	"time"
)

// A record is stored in a small binary form, the same on both backends:
//
//	[0]      format version (1)
//	[1:9]    Seq, big-endian
//	[9:17]   Occurrence, big-endian
//	[17:49]  Ref, the body's raw SHA-256
//	[49]     flags: bit 0 Upstream, bit 1 Stream
//	then     uvarint Status, varint CostNanos, varint SavedNanos,
//	         varint Time (Unix ns), and Key, Outcome, Model, ContentType
//	         each as a uvarint length and the bytes
//
// Seq and Occurrence sit at fixed offsets so that the Redis script can set
// them, and Ref so that it can find the body, without decoding the rest.
const (
	recordVersion = 1
	seqOff        = 1
	occOff        = 9
	refOff        = 17
	flagsOff      = 49
	fixedLen      = 50

	flagUpstream = 1 << 0
	flagStream   = 1 << 1
)

// encodeRecord returns the stored form of r.
func encodeRecord(r *record) ([]byte, error) {
	ref, err := rawRef(r.Ref)
	if err != nil {
		return nil, err
	}
	b := make([]byte, fixedLen, fixedLen+5*binary.MaxVarintLen64+len(r.Key)+len(r.Outcome)+len(r.Model)+len(r.ContentType))
	b[0] = recordVersion
	binary.BigEndian.PutUint64(b[seqOff:], uint64(r.Seq))
	binary.BigEndian.PutUint64(b[occOff:], uint64(r.Occurrence))
	copy(b[refOff:], ref)
	if r.Upstream {
		b[flagsOff] |= flagUpstream
	}
	if r.Stream {
		b[flagsOff] |= flagStream
	}
	b = binary.AppendUvarint(b, uint64(r.Status))
	b = binary.AppendVarint(b, r.CostNanos)
	b = binary.AppendVarint(b, r.SavedNanos)
	b = binary.AppendVarint(b, r.Time.UnixNano())
	for _, s := range [...]string{r.Key, r.Outcome, r.Model, r.ContentType} {
		b = binary.AppendUvarint(b, uint64(len(s)))
		b = append(b, s...)
	}
	return b, nil
}

// decodeRecord parses a stored record; damage of any kind is an error
// wrapping ErrCorrupt, never a panic.
func decodeRecord(b []byte) (record, error) {
	var r record
	if len(b) < fixedLen {
		return r, fmt.Errorf("%w: record of %d bytes is too short", ErrCorrupt, len(b))
	}
	if b[0] != recordVersion {
		return r, fmt.Errorf("%w: record format version %d, want %d", ErrCorrupt, b[0], recordVersion)
	}
	if b[flagsOff]&^(flagUpstream|flagStream) != 0 {
		return r, fmt.Errorf("%w: record has unknown flags %#x", ErrCorrupt, b[flagsOff])
	}
	r.Seq = int64(binary.BigEndian.Uint64(b[seqOff:]))
	r.Occurrence = int64(binary.BigEndian.Uint64(b[occOff:]))
	r.Ref = hex.EncodeToString(b[refOff:flagsOff])
	r.Upstream = b[flagsOff]&flagUpstream != 0
	r.Stream = b[flagsOff]&flagStream != 0
	d := decoder{b: b[fixedLen:]}
	status := d.uvarint()
	r.CostNanos = d.varint()
	r.SavedNanos = d.varint()
	r.Time = time.Unix(0, d.varint()).UTC()
	r.Key, r.Outcome, r.Model, r.ContentType = d.str(), d.str(), d.str(), d.str()
	if d.err == nil && len(d.b) != 0 {
		d.err = fmt.Errorf("%d trailing bytes", len(d.b))
	}
	if d.err == nil && status > 999 {
		d.err = fmt.Errorf("status %d", status)
	}
	if d.err == nil && (r.Seq < 1 || r.Occurrence < 1) {
		d.err = fmt.Errorf("seq %d, occurrence %d", r.Seq, r.Occurrence)
	}
	if d.err != nil {
		return record{}, fmt.Errorf("%w: record: %w", ErrCorrupt, d.err)
	}
	r.Status = int(status)
	return r, nil
}

// decoder reads varints and strings from b, remembering the first error.
type decoder struct {
	b   []byte
	err error
}

func (d *decoder) uvarint() uint64 {
	if d.err != nil {
		return 0
	}
	v, n := binary.Uvarint(d.b)
	if n <= 0 {
		d.err = fmt.Errorf("bad uvarint")
		return 0
	}
	d.b = d.b[n:]
	return v
}

func (d *decoder) varint() int64 {
	if d.err != nil {
		return 0
	}
	v, n := binary.Varint(d.b)
	if n <= 0 {
		d.err = fmt.Errorf("bad varint")
		return 0
	}
	d.b = d.b[n:]
	return v
}

func (d *decoder) str() string {
	n := d.uvarint()
	if d.err != nil {
		return ""
	}
	if n > uint64(len(d.b)) {
		d.err = fmt.Errorf("string of %d bytes past the end", n)
		return ""
	}
	s := string(d.b[:n])
	d.b = d.b[n:]
	return s
}

// The bolt backend stores a run's tally as version 2 followed by the ten
// figures as varints: next Seq - 1 (= Calls), Upstream, Cost, Saved, Keys,
// Bodies, Bytes, First, Last, Stored. Version 1, written before Stored was
// kept, has the first nine; it decodes with Stored -1, for the reader to
// count (runBuckets.tally).
const tallyVersion = 2

func encodeTally(t *tally) []byte {
	b := []byte{tallyVersion}
	for _, v := range [...]int64{t.Calls, t.Upstream, t.Cost, t.Saved, t.Keys, t.Bodies, t.Bytes, t.First, t.Last, t.Stored} {
		b = binary.AppendVarint(b, v)
	}
	return b
}

func decodeTally(b []byte) (tally, error) {
	var t tally
	if len(b) < 1 || (b[0] != tallyVersion && b[0] != 1) {
		return t, fmt.Errorf("%w: run summary has an unknown format", ErrCorrupt)
	}
	figures := []*int64{&t.Calls, &t.Upstream, &t.Cost, &t.Saved, &t.Keys, &t.Bodies, &t.Bytes, &t.First, &t.Last, &t.Stored}
	if b[0] == 1 {
		figures, t.Stored = figures[:9], -1
	}
	d := decoder{b: b[1:]}
	for _, p := range figures {
		*p = d.varint()
	}
	if d.err == nil && len(d.b) != 0 {
		d.err = fmt.Errorf("%d trailing bytes", len(d.b))
	}
	if d.err == nil && t.Calls < 1 {
		d.err = fmt.Errorf("%d calls", t.Calls)
	}
	if d.err != nil {
		return tally{}, fmt.Errorf("%w: run summary: %w", ErrCorrupt, d.err)
	}
	return t, nil
}
