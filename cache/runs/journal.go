package runs

import (
	"context"
	"io"
)

// Journal is the run journal contract; BoltJournal and RedisJournal
// implement it with identical behaviour. Every method is scoped by a team:
// no call made for one team reads or changes another team's runs. Methods
// are safe for concurrent use, also from several processes sharing one
// backend. Arguments that break the package's rules (ValidID, an empty team
// or key, the Max* limits) fail with an error wrapping ErrInvalid.
type Journal interface {
	// Record appends one call to team's run, creating the run on its first
	// call, unless that would take the team's runs past their quota
	// (ErrQuota). It assigns e.Seq and e.Occurrence atomically, sets e.Ref to the
	// body's SHA-256 and e.Stream to a.Stream (a zero e.Time becomes the
	// current time), and returns the entry as stored. The entry is durable
	// when Record returns: fsynced on bbolt, acknowledged by Redis.
	Record(ctx context.Context, team, run string, e Entry, a Answer) (Entry, error)
	// Lookup returns the occurrence-th call (1-based) of team's run with
	// key and the exact answer its client received. A run that does not
	// exist is an error wrapping ErrNotFound; a run without that call is a
	// *MissError (which also unwraps to ErrNotFound) telling how many calls
	// with key it has.
	Lookup(ctx context.Context, team, run, key string, occurrence int64) (Entry, Answer, error)
	// Count returns how many calls with key team's run recorded (0 for an
	// unknown key or run).
	Count(ctx context.Context, team, run, key string) (int64, error)
	// Summary describes team's run, or fails with ErrNotFound.
	Summary(ctx context.Context, team, run string) (Summary, error)
	// List describes all of team's runs, the most recently active (Last)
	// first, ties by run id.
	List(ctx context.Context, team string) ([]Summary, error)
	// Entries calls fn with each entry of team's run in Seq order, up to the
	// last one recorded when Entries started, and stops at fn's first error,
	// which it returns. A missing run fails with ErrNotFound. fn runs
	// outside any backend transaction, so it may call the Journal.
	Entries(ctx context.Context, team, run string, fn func(Entry) error) error
	// Delete removes team's run: entries, bodies and summary. A missing run
	// fails with ErrNotFound.
	Delete(ctx context.Context, team, run string) error
	// Export writes team's run to w as one archive (see Archives in the
	// package doc). A missing run fails with ErrNotFound.
	Export(ctx context.Context, team, run string, w io.Writer) error
	// Import reads an archive written by Export (by either backend) and
	// stores its run under team, the importing team, whatever team the
	// archive names, and under opts.As if set. The archive is checked as
	// it is read into a staging run that readers do not see; the run
	// appears at once (one bbolt transaction, one Redis script) once all
	// of it checked, and a refused archive leaves no trace. A refused
	// archive fails with ErrCorruptArchive, one past a limit with
	// ErrTooLarge (before any body is inflated when the manifest declares
	// it), one that does not fit the team's quota with ErrQuota (before
	// anything is written), a run id the team already has with ErrExists
	// unless opts.Replace.
	Import(ctx context.Context, team string, r io.Reader, opts ImportOptions) (Summary, error)
	// Usage reports how much team's runs hold against its storage quota.
	Usage(ctx context.Context, team string) (Usage, error)
}

// Usage is a team's run storage against its quota.
type Usage struct {
	// Bytes is what the team's runs hold: every distinct body and every
	// entry with its indexes (an estimate of the backend's own overhead
	// aside).
	Bytes int64
	// QuotaBytes is the most they may hold; 0 means no quota.
	QuotaBytes int64
}
