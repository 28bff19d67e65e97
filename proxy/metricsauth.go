package proxy

import (
	"crypto/sha256"
	"crypto/subtle"
	"net/http"
)

// MetricsAccess says who may read GET /metrics. The zero value lets anyone
// (the endpoint is served only with Options.Gatherer set).
type MetricsAccess struct {
	// Off serves no /metrics at all (404).
	Off bool
	// TokenHashes are SHA-256 digests of bearer tokens that may read
	// /metrics (a scraper's).
	TokenHashes [][sha256.Size]byte
	// Admin lets every admin key (Options.AdminKeyHashes) read /metrics.
	Admin bool
}

// open reports whether anyone may read /metrics.
func (a MetricsAccess) open() bool { return !a.Admin && len(a.TokenHashes) == 0 }

// metricsHandler guards h with the access rule: a bearer key that is one
// of the tokens, or with Admin one of the admin keys.
func (p *Proxy) metricsHandler(h http.Handler, a MetricsAccess) http.HandlerFunc {
	if a.open() {
		return h.ServeHTTP
	}
	keys := append([][sha256.Size]byte(nil), a.TokenHashes...)
	if a.Admin {
		keys = append(keys, p.adminKeys...)
	}
	return func(w http.ResponseWriter, r *http.Request) {
		if len(keys) == 0 {
			writeError(w, &apiError{status: http.StatusForbidden, typ: errPermission, code: "metrics_locked",
				message: "/metrics needs a key and none is configured: set metrics.token_env or admin.keys, or metrics.auth: open"})
			return
		}
		key, ok := bearer(r.Header.Get("Authorization"))
		if !ok {
			refuseConnection(w, &apiError{status: http.StatusUnauthorized, typ: errAuthentication, code: "missing_key",
				message: "missing bearer key: send Authorization: Bearer <metrics token or admin key>"})
			return
		}
		sum := sha256.Sum256([]byte(key))
		match := 0
		for _, k := range keys {
			match |= subtle.ConstantTimeCompare(sum[:], k[:])
		}
		if match != 1 {
			refuseConnection(w, &apiError{status: http.StatusUnauthorized, typ: errAuthentication, code: "invalid_key", message: "not a key that may read /metrics"})
			return
		}
		h.ServeHTTP(w, r)
	}
}
