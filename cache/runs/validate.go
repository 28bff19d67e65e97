package runs

import (
	"fmt"
	"math"
	"time"
	"unicode/utf8"
)

// Limits on what one entry may hold. Both backends enforce them in Record,
// and Import enforces them on every archived entry.
const (
	// MaxIDLen is the longest run id.
	MaxIDLen = 128
	// MaxTeamLen is the longest team name.
	MaxTeamLen = 256
	// MaxKeyLen is the longest request key.
	MaxKeyLen = 1024
	// MaxLabelLen is the longest Outcome, Model or Answer.ContentType. Keys
	// and labels must be UTF-8.
	MaxLabelLen = 1024
	// MaxBodyBytes is the largest answer body Record accepts, and the
	// default per-body limit of Import, so that every recorded run can be
	// exported and imported again with the default limits.
	MaxBodyBytes = 64 << 20
)

// ValidID reports whether id can name a run: 1 to 128 characters, each an
// ASCII letter, digit, '.', '_' or '-'. The error wraps ErrInvalid and names
// the rule that id breaks.
func ValidID(id string) error {
	if id == "" {
		return fmt.Errorf("%w: empty run id (want 1-%d characters of A-Z a-z 0-9 . _ -)", ErrInvalid, MaxIDLen)
	}
	if len(id) > MaxIDLen {
		return fmt.Errorf("%w: run id is %d characters long, the limit is %d", ErrInvalid, len(id), MaxIDLen)
	}
	for i := 0; i < len(id); i++ {
		c := id[i]
		if !('a' <= c && c <= 'z' || 'A' <= c && c <= 'Z' || '0' <= c && c <= '9' || c == '.' || c == '_' || c == '-') {
			return fmt.Errorf("%w: run id %.32q has %q at byte %d (allowed: A-Z a-z 0-9 . _ -)", ErrInvalid, id, c, i)
		}
	}
	return nil
}

// validTeam checks a team name: 1 to MaxTeamLen bytes.
func validTeam(team string) error {
	if team == "" || len(team) > MaxTeamLen {
		return fmt.Errorf("%w: team name must be 1-%d bytes, got %d", ErrInvalid, MaxTeamLen, len(team))
	}
	return nil
}

// validScope checks a (team, run) pair.
func validScope(team, run string) error {
	if err := validTeam(team); err != nil {
		return err
	}
	return ValidID(run)
}

// validKey checks a request key: 1 to MaxKeyLen bytes of UTF-8 (so that
// archives, which hold entries as JSON, keep it exactly).
func validKey(key string) error {
	if key == "" || len(key) > MaxKeyLen {
		return fmt.Errorf("%w: request key must be 1-%d bytes, got %d", ErrInvalid, MaxKeyLen, len(key))
	}
	if !utf8.ValidString(key) {
		return fmt.Errorf("%w: request key %.32q is not UTF-8", ErrInvalid, key)
	}
	return nil
}

// Times are stored as Unix nanoseconds, which cover 1678 to 2262.
var (
	minTime = time.Unix(0, math.MinInt64)
	maxTime = time.Unix(0, math.MaxInt64)
)

// validRecord checks what Record and Import store besides the body: the
// entry's key, labels and time, and the answer's header fields.
func validRecord(r *record) error {
	if err := validKey(r.Key); err != nil {
		return err
	}
	for _, l := range [...]struct{ name, v string }{{"outcome", r.Outcome}, {"model", r.Model}, {"content type", r.ContentType}} {
		if len(l.v) > MaxLabelLen {
			return fmt.Errorf("%w: %s is %d bytes, the limit is %d", ErrInvalid, l.name, len(l.v), MaxLabelLen)
		}
		if !utf8.ValidString(l.v) {
			return fmt.Errorf("%w: %s %.32q is not UTF-8", ErrInvalid, l.name, l.v)
		}
	}
	if r.Status < 100 || r.Status > 999 {
		return fmt.Errorf("%w: status %d is not an HTTP status", ErrInvalid, r.Status)
	}
	if r.Time.Before(minTime) || r.Time.After(maxTime) {
		return fmt.Errorf("%w: time %s is outside 1678-2262", ErrInvalid, r.Time)
	}
	return nil
}
