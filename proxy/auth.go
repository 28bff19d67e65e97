package proxy

import (
	"crypto/sha256"
	"crypto/subtle"
	"net/http"
	"strings"

	"github.com/stintlab/stint/budget/guard"
)

// Team is a client team: its keys, cache namespace and cache switch.
type Team struct {
	// Name identifies the team in logs, metrics and cache namespaces.
	Name string
	// KeyHashes are SHA-256 digests of the team's bearer keys.
	KeyHashes [][sha256.Size]byte
	// Namespace is the cache namespace; empty means the team's own (its name).
	// Teams given the same namespace share cached answers.
	Namespace string
	// CacheOff forwards every call without looking up or storing.
	CacheOff bool
	// MaxInFlight caps the team's requests in flight on this proxy,
	// replacing Options.MaxInFlight; -1 means no cap, 0 the proxy's.
	MaxInFlight int
}

func (t *Team) namespace() string {
	if t.Namespace != "" {
		return t.Namespace
	}
	return "team:" + t.Name
}

// authenticate maps the request's bearer key to a team. In open mode (no
// teams configured) every request belongs to the default team.
func (p *Proxy) authenticate(r *http.Request) (*Team, string, *apiError) {
	if p.open != nil {
		return p.open, "", nil
	}
	key, ok := bearer(r.Header.Get("Authorization"))
	if !ok {
		return nil, "", &apiError{status: http.StatusUnauthorized, typ: errAuthentication, code: "missing_key", message: "missing bearer key: send Authorization: Bearer <team key>"}
	}
	sum := sha256.Sum256([]byte(key))
	var found *Team
	// Compare against every key so the time taken does not tell which matched.
	for i := range p.teams {
		t := &p.teams[i]
		for _, h := range t.KeyHashes {
			if subtle.ConstantTimeCompare(sum[:], h[:]) == 1 && found == nil {
				found = t
			}
		}
	}
	if found == nil {
		return nil, "", &apiError{status: http.StatusUnauthorized, typ: errAuthentication, code: "invalid_key", message: "unknown key"}
	}
	return found, guard.KeyID(sum), nil
}

func bearer(h string) (string, bool) {
	const prefix = "Bearer "
	if len(h) < len(prefix) || !strings.EqualFold(h[:len(prefix)], prefix) {
		return "", false
	}
	k := strings.TrimSpace(h[len(prefix):])
	return k, k != ""
}
