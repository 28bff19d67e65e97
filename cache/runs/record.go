package runs

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"fmt"
	"time"
)

// record is everything journaled for one call except the body: the Entry
// and its answer's header fields.
type record struct {
	Entry
	Status      int
	ContentType string
}

// newRecord builds the record Record stores for e and a, before Seq and
// Occurrence are assigned, and checks it.
func newRecord(e Entry, a Answer, now func() time.Time) (record, error) {
	if len(a.Body) > MaxBodyBytes {
		return record{}, fmt.Errorf("%w: answer body is %d bytes, the limit is %d", ErrInvalid, len(a.Body), MaxBodyBytes)
	}
	e.Seq, e.Occurrence = 0, 0
	e.Ref = refOf(a.Body)
	e.Stream = a.Stream
	if e.Time.IsZero() {
		e.Time = now()
	}
	e.Time = e.Time.UTC()
	r := record{Entry: e, Status: a.Status, ContentType: a.ContentType}
	if err := validRecord(&r); err != nil {
		return record{}, err
	}
	return r, nil
}

// answer rebuilds the Answer of r with its body.
func (r *record) answer(body []byte) Answer {
	return Answer{Status: r.Status, ContentType: r.ContentType, Body: body, Stream: r.Stream}
}

// refOf is the content address of a body: its SHA-256 in lower-case hex.
func refOf(body []byte) string {
	sum := sha256.Sum256(body)
	return hex.EncodeToString(sum[:])
}

// rawRef decodes a content address to its 32 bytes.
func rawRef(ref string) ([]byte, error) {
	b, err := hex.DecodeString(ref)
	if err != nil || len(b) != sha256.Size || hex.EncodeToString(b) != ref {
		return nil, fmt.Errorf("%w: %.70q is not a lower-case hex SHA-256", ErrInvalid, ref)
	}
	return b, nil
}

// checkBody verifies that body still hashes to ref.
func checkBody(ref string, body []byte) error {
	if got := refOf(body); got != ref {
		return fmt.Errorf("%w: body %.16s… hashes to %.16s…", ErrCorrupt, ref, got)
	}
	return nil
}

// tally sums a run's entries into its Summary figures. Both backends keep
// one per run, and Export and Import recompute it from the entries.
type tally struct {
	Calls, Upstream, Cost, Saved int64
	Keys, Bodies, Bytes          int64
	First, Last                  int64 // Unix ns; meaningful when Calls > 0
	// Stored is what the run holds against its team's quota: Bytes plus
	// entryBytes of every entry. -1 in a tally read from a run written
	// before it was kept (see decodeTally).
	Stored int64
}

// add counts r; newKey and newBody say whether r is the run's first call
// with its key and the first with its body, of bodyLen bytes.
func (t *tally) add(r *record, newKey, newBody bool, bodyLen int) {
	ns := r.Time.UnixNano()
	if t.Calls == 0 || ns < t.First {
		t.First = ns
	}
	if t.Calls == 0 || ns > t.Last {
		t.Last = ns
	}
	t.Calls++
	if r.Upstream {
		t.Upstream++
	}
	t.Cost += r.CostNanos
	t.Saved += r.SavedNanos
	if newKey {
		t.Keys++
	}
	if newBody {
		t.Bodies++
		t.Bytes += int64(bodyLen)
	}
	t.Stored += r.stored(newBody, bodyLen)
}

// stored is what recording r adds to its run's Stored: its entry, and its
// body of bodyLen bytes if that is new to the run.
func (r *record) stored(newBody bool, bodyLen int) int64 {
	n := entryBytes(r)
	if newBody {
		n += int64(bodyLen)
	}
	return n
}

// indexOverhead is what an entry's indexes hold besides its key: the Seq
// it is stored under, the occurrence count, and the index's occurrence and
// Seq.
const indexOverhead = 32

// entryBytes is what one entry holds in either backend, counted for the
// quota: its stored record and its two indexes by key (an estimate of the
// backend's own per-key overhead aside).
func entryBytes(r *record) int64 {
	var buf [binary.MaxVarintLen64]byte
	n := fixedLen + len(binary.AppendUvarint(buf[:0], uint64(r.Status)))
	for _, v := range [...]int64{r.CostNanos, r.SavedNanos, r.Time.UnixNano()} {
		n += len(binary.AppendVarint(buf[:0], v))
	}
	for _, str := range [...]string{r.Key, r.Outcome, r.Model, r.ContentType} {
		n += len(binary.AppendUvarint(buf[:0], uint64(len(str)))) + len(str)
	}
	return int64(n + 2*len(r.Key) + indexOverhead)
}

// summary is t as the Summary of team's run.
func (t tally) summary(team, run string) Summary {
	return Summary{
		Team: team, Run: run,
		First: time.Unix(0, t.First).UTC(), Last: time.Unix(0, t.Last).UTC(),
		Calls: t.Calls, Upstream: t.Upstream, CostNanos: t.Cost, SavedNanos: t.Saved,
		Keys: t.Keys, Bodies: t.Bodies, Bytes: t.Bytes,
	}
}
