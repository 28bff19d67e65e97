package runs

import (
	"fmt"
	"math"
	"mime"
	"strings"
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
	// DefaultQuotaBytes is the default of what one team's runs may hold
	// (BoltOptions.QuotaBytes, RedisOptions.QuotaBytes).
	DefaultQuotaBytes = 256 << 20
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
// entry's key, labels and time, and the answer's header fields (see
// validAnswer).
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
	if err := validAnswer(r.Status, r.ContentType, r.Stream); err != nil {
		return err
	}
	if r.Time.Before(minTime) || r.Time.After(maxTime) {
		return fmt.Errorf("%w: time %s is outside 1678-2262", ErrInvalid, r.Time)
	}
	return nil
}

// validAnswer checks an answer's status, content type and stream flag
// against what a recording of the wire format produces, so that a replay
// (which answers them as they are) never sends anything else: a status an
// upstream answer can carry a body with (2xx but 204, 205 and 206; 4xx;
// 5xx), and the content type application/json, or text/event-stream for a
// streamed answer (status 200), with at most a charset=utf-8 parameter.
func validAnswer(status int, contentType string, stream bool) error {
	switch {
	case status >= 200 && status <= 299 && status != 204 && status != 205 && status != 206:
	case status >= 400 && status <= 599:
	default:
		return fmt.Errorf("%w: status %d is not one a recorded answer has (2xx with a body, 4xx, 5xx)", ErrInvalid, status)
	}
	mt, params, err := mime.ParseMediaType(contentType)
	if err != nil {
		return fmt.Errorf("%w: content type %.64q: %v", ErrInvalid, contentType, err)
	}
	for k, v := range params {
		if k != "charset" || !strings.EqualFold(v, "utf-8") {
			return fmt.Errorf("%w: content type %.64q: parameter %.32q (only charset=utf-8)", ErrInvalid, contentType, k)
		}
	}
	switch {
	case mt == "application/json" && !stream:
	case mt == "text/event-stream" && stream && status == 200:
	case mt == "application/json", mt == "text/event-stream":
		return fmt.Errorf("%w: content type %s with stream=%v and status %d (a stream is text/event-stream with 200, anything else application/json)",
			ErrInvalid, mt, stream, status)
	default:
		return fmt.Errorf("%w: content type %.64q is not the wire format's (application/json, text/event-stream)", ErrInvalid, contentType)
	}
	return nil
}
