package runs

import (
	"errors"
	"fmt"
)

// Errors callers can act on, wrapped by the errors this package returns;
// test for them with errors.Is.
var (
	// ErrNotFound reports a run, or a call of a run, that is not recorded.
	ErrNotFound = errors.New("runs: not found")
	// ErrExists reports an Import onto a run id the team already has,
	// without ImportOptions.Replace.
	ErrExists = errors.New("runs: run already exists")
	// ErrInvalid reports an argument that breaks a rule of this package: a
	// bad run id, an empty team or key, an oversized body.
	ErrInvalid = errors.New("runs: invalid argument")
	// ErrCorrupt reports a stored value that does not decode or whose body
	// no longer matches its SHA-256.
	ErrCorrupt = errors.New("runs: stored value is corrupt")
	// ErrCorruptArchive reports an archive that Import refuses: damaged,
	// truncated, of an unknown format or version, inconsistent, or holding
	// what no recording produces.
	ErrCorruptArchive = errors.New("runs: corrupt archive")
	// ErrTooLarge reports an archive past an import limit (ImportOptions):
	// its size compressed or not, a body's size, its members or entries,
	// its compression window. It also matches ErrCorruptArchive (every
	// archive Import refuses does).
	ErrTooLarge error = tooLargeError{}
	// ErrQuota reports a Record or Import that would take a team's run
	// journals past its storage quota; a *QuotaError says by how much.
	ErrQuota = errors.New("runs: team storage quota exceeded")
)

// QuotaError is the error a Record or Import refused by the team's storage
// quota returns. It unwraps to ErrQuota.
type QuotaError struct {
	Team  string
	Used  int64 // bytes the team's runs hold (and imports in progress reserve)
	Need  int64 // bytes the refused call would have added
	Quota int64
}

func (e *QuotaError) Error() string {
	return fmt.Sprintf("runs: team %q holds %d bytes of run journals of its %d-byte quota; this needs %d more",
		e.Team, e.Used, e.Quota, e.Need)
}

// Unwrap returns ErrQuota.
func (e *QuotaError) Unwrap() error { return ErrQuota }

// MissError is the error Lookup returns when the run exists but has no
// call with the key at the asked occurrence. It unwraps to ErrNotFound, and
// Have tells how many calls with that key the run did record, so that a
// replay miss can be explained (a different request, or more repeats of it
// than the recording made).
type MissError struct {
	Run        string
	Key        string
	Occurrence int64 // the occurrence asked for
	Have       int64 // occurrences recorded for Key
}

func (e *MissError) Error() string {
	if e.Have == 0 {
		return fmt.Sprintf("runs: run %q never made a call with key %.16s", e.Run, e.Key)
	}
	return fmt.Sprintf("runs: run %q recorded %d call(s) with key %.16s, replay asked for call %d",
		e.Run, e.Have, e.Key, e.Occurrence)
}

// Unwrap returns ErrNotFound.
func (e *MissError) Unwrap() error { return ErrNotFound }

// tooLargeError is ErrTooLarge: a refused archive, so errors.Is matches
// ErrCorruptArchive too.
type tooLargeError struct{}

func (tooLargeError) Error() string        { return "runs: archive past an import limit" }
func (tooLargeError) Is(target error) bool { return target == ErrCorruptArchive }
