package proxy

import (
	"encoding/json"
	"net/http"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// Error types used in the wire format's error body.
const (
	errInvalidRequest = "invalid_request_error"
	errAuthentication = "authentication_error"
	errPermission     = "permission_error"
	errRateLimit      = "rate_limit_error"
	errUpstream       = "upstream_error"
	errCache          = "cache_error"
	errServer         = "server_error"
)

// apiError is an error that knows its HTTP status and wire error fields.
type apiError struct {
	status  int
	typ     string
	code    string
	param   string
	message string
	// retryAfter, when set, is sent as Retry-After (RFC 9110 §10.2.3).
	retryAfter time.Duration
}

func (e *apiError) Error() string { return e.message }

func badRequest(param, format string, args ...any) *apiError {
	return &apiError{status: http.StatusBadRequest, typ: errInvalidRequest, code: "invalid_value", param: param, message: sprintf(format, args...)}
}

// writeError writes err in the wire format's error shape. Errors that are not
// *apiError become a 500 without their text (it may hold internals).
func writeError(w http.ResponseWriter, e *apiError) {
	b, _ := json.Marshal(wire.NewError(e.typ, e.code, e.param, e.message))
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Content-Length", itoa(len(b)))
	if e.retryAfter > 0 {
		w.Header().Set("Retry-After", retryAfterSeconds(e.retryAfter))
	}
	w.WriteHeader(e.status)
	_, _ = w.Write(b)
}
