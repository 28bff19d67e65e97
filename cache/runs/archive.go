package runs

import (
	"archive/tar"
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"time"

	"github.com/klauspost/compress/zstd"
)

// An archive is one self-contained file holding one run: a zstd stream
// (with its content checksum) of a tar (USTAR), then a trailer (see
// trailer.go) with the SHA-256 of the zstd stream. The tar's members are,
// in this order:
//
//	manifest.json     the manifest: format "stint-run-archive", version 1,
//	                  team and run id (informational), created time, entry
//	                  count, the run's summary figures, and the name, size
//	                  and SHA-256 of every other member, in archive order
//	entries           every entry as JSON, one object a line, in Seq order
//	bodies/<sha256>   one member per distinct answer body, in order of
//	                  first use, named by its SHA-256
//
// Import checks all of it (see archiveReader) before the run it writes
// becomes visible.
const (
	archiveFormat  = "stint-run-archive"
	archiveVersion = 1
	manifestName   = "manifest.json"
	entriesName    = "entries"
	bodyPrefix     = "bodies/"
)

// manifest is the archive's first member.
type manifest struct {
	Format  string      `json:"format"`
	Version int         `json:"version"`
	Team    string      `json:"team"`
	Run     string      `json:"run"`
	Created time.Time   `json:"created"`
	Entries int64       `json:"entries"`
	Summary archSummary `json:"summary"`
	Members []member    `json:"members"`
}

// archSummary holds the Summary figures in the manifest.
type archSummary struct {
	First      time.Time `json:"first"`
	Last       time.Time `json:"last"`
	Calls      int64     `json:"calls"`
	Upstream   int64     `json:"upstream"`
	CostNanos  int64     `json:"cost_nanos"`
	SavedNanos int64     `json:"saved_nanos"`
	Keys       int64     `json:"keys"`
	Bodies     int64     `json:"bodies"`
	Bytes      int64     `json:"bytes"`
}

func newArchSummary(t tally) archSummary {
	s := t.summary("", "")
	return archSummary{
		First: s.First, Last: s.Last, Calls: s.Calls, Upstream: s.Upstream,
		CostNanos: s.CostNanos, SavedNanos: s.SavedNanos, Keys: s.Keys, Bodies: s.Bodies, Bytes: s.Bytes,
	}
}

// equal reports whether s and o hold the same figures and instants.
func (s archSummary) equal(o archSummary) bool {
	t1, t2 := s, o
	t1.First, t1.Last, t2.First, t2.Last = time.Time{}, time.Time{}, time.Time{}, time.Time{}
	return t1 == t2 && s.First.Equal(o.First) && s.Last.Equal(o.Last)
}

// member describes one archive member after the manifest.
type member struct {
	Name   string `json:"name"`
	Size   int64  `json:"size"`
	SHA256 string `json:"sha256"`
}

// archEntry is one line of the entries member.
type archEntry struct {
	Seq         int64     `json:"seq"`
	Key         string    `json:"key"`
	Occurrence  int64     `json:"occurrence"`
	Ref         string    `json:"ref"`
	Status      int       `json:"status"`
	ContentType string    `json:"content_type"`
	Stream      bool      `json:"stream"`
	Outcome     string    `json:"outcome"`
	Upstream    bool      `json:"upstream"`
	CostNanos   int64     `json:"cost_nanos"`
	SavedNanos  int64     `json:"saved_nanos"`
	Model       string    `json:"model"`
	Time        time.Time `json:"time"`
}

func newArchEntry(r *record) archEntry {
	return archEntry{
		Seq: r.Seq, Key: r.Key, Occurrence: r.Occurrence, Ref: r.Ref,
		Status: r.Status, ContentType: r.ContentType, Stream: r.Stream,
		Outcome: r.Outcome, Upstream: r.Upstream, CostNanos: r.CostNanos, SavedNanos: r.SavedNanos,
		Model: r.Model, Time: r.Time,
	}
}

func (a *archEntry) record() record {
	return record{
		Entry: Entry{
			Seq: a.Seq, Key: a.Key, Occurrence: a.Occurrence, Ref: a.Ref,
			Outcome: a.Outcome, Upstream: a.Upstream, CostNanos: a.CostNanos, SavedNanos: a.SavedNanos,
			Model: a.Model, Stream: a.Stream, Time: a.Time.UTC(),
		},
		Status: a.Status, ContentType: a.ContentType,
	}
}

// snapshot is what Export reads of a run in one consistent view: its
// records in Seq order and the size of every body they use.
type snapshot struct {
	recs  []record
	sizes map[string]int64 // by ref
}

// source is what Export needs from a backend.
type source interface {
	// snapshot reads team's run, or fails with ErrNotFound.
	snapshot(ctx context.Context, team, run string) (*snapshot, error)
	// body calls fn with one body of team's run, whole or in pieces in
	// order; fn runs outside any backend transaction.
	body(ctx context.Context, team, run, ref string, fn func([]byte) error) error
}

// export writes team's run from src to w as an archive created at now.
// Bodies are read one at a time, piece by piece for those imported in
// chunks, so memory stays at the entries' size plus the largest body
// recorded whole.
func export(ctx context.Context, src source, team, run string, w io.Writer, now time.Time) error {
	if err := validScope(team, run); err != nil {
		return err
	}
	snap, err := src.snapshot(ctx, team, run)
	if err != nil {
		return err
	}
	var (
		entries bytes.Buffer
		enc     = json.NewEncoder(&entries)
		t       tally
		seen    = map[string]bool{}
		keys    = map[string]bool{}
		bodies  []member
	)
	for i := range snap.recs {
		r := &snap.recs[i]
		if err := enc.Encode(newArchEntry(r)); err != nil {
			return fmt.Errorf("runs: export: %w", err)
		}
		newBody := !seen[r.Ref]
		size, ok := snap.sizes[r.Ref]
		if !ok {
			return fmt.Errorf("%w: run %q: body %.16s… of entry %d is missing", ErrCorrupt, run, r.Ref, r.Seq)
		}
		if newBody {
			seen[r.Ref] = true
			bodies = append(bodies, member{Name: bodyPrefix + r.Ref, Size: size, SHA256: r.Ref})
		}
		t.add(r, !keys[r.Key], newBody, int(size))
		keys[r.Key] = true
	}
	sum := sha256.Sum256(entries.Bytes())
	m := manifest{
		Format: archiveFormat, Version: archiveVersion, Team: team, Run: run,
		Created: now.UTC(), Entries: int64(len(snap.recs)), Summary: newArchSummary(t),
		Members: append([]member{{Name: entriesName, Size: int64(entries.Len()), SHA256: hex.EncodeToString(sum[:])}}, bodies...),
	}
	mj, err := json.MarshalIndent(m, "", " ")
	if err != nil {
		return fmt.Errorf("runs: export: %w", err)
	}
	mj = append(mj, '\n')

	hw := &hashWriter{w: w, h: sha256.New()}
	zw, err := zstd.NewWriter(hw, zstd.WithEncoderConcurrency(1))
	if err != nil {
		return fmt.Errorf("runs: export: %w", err)
	}
	defer zw.Close()
	tw := tar.NewWriter(zw)
	header := func(name string, size int64) error {
		return tw.WriteHeader(&tar.Header{
			Typeflag: tar.TypeReg, Name: name, Size: size, Mode: 0o644,
			ModTime: m.Created.Truncate(time.Second), Format: tar.FormatUSTAR,
		})
	}
	put := func(name string, data []byte) error {
		if err := header(name, int64(len(data))); err != nil {
			return err
		}
		_, err := tw.Write(data)
		return err
	}
	if err := put(manifestName, mj); err != nil {
		return fmt.Errorf("runs: export %q: %w", run, err)
	}
	if err := put(entriesName, entries.Bytes()); err != nil {
		return fmt.Errorf("runs: export %q: %w", run, err)
	}
	for _, b := range bodies {
		if err := ctx.Err(); err != nil {
			return err
		}
		if err := header(b.Name, b.Size); err != nil {
			return fmt.Errorf("runs: export %q: %w", run, err)
		}
		h, n := sha256.New(), int64(0)
		err := src.body(ctx, team, run, b.SHA256, func(p []byte) error {
			if n += int64(len(p)); n > b.Size {
				return fmt.Errorf("body %.16s… changed size during export", b.SHA256)
			}
			h.Write(p)
			_, err := tw.Write(p)
			return err
		})
		if err == nil && n != b.Size {
			err = fmt.Errorf("body %.16s… changed size during export", b.SHA256)
		}
		if err == nil && hex.EncodeToString(h.Sum(nil)) != b.SHA256 {
			err = fmt.Errorf("%w: body %.16s… no longer matches its SHA-256", ErrCorrupt, b.SHA256)
		}
		if err != nil {
			return fmt.Errorf("runs: export %q: %w", run, err)
		}
	}
	if err := tw.Close(); err != nil {
		return fmt.Errorf("runs: export %q: %w", run, err)
	}
	if err := zw.Close(); err != nil {
		return fmt.Errorf("runs: export %q: %w", run, err)
	}
	if err := writeTrailer(hw); err != nil {
		return fmt.Errorf("runs: export %q: %w", run, err)
	}
	return nil
}
