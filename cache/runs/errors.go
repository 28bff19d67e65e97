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
	// truncated, of an unknown format or version, inconsistent, or past an
	// import limit.
	ErrCorruptArchive = errors.New("runs: corrupt archive")
)

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
