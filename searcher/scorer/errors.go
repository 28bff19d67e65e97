package scorer

import (
	"errors"
	"fmt"
	"net/http"
	"time"
)

// Sentinels an *APIError unwraps to, by status.
var (
	// ErrBudget is 402: the proxy refused the call because a budget is
	// spent. Stop the search; retrying will not help.
	ErrBudget = errors.New("scorer: budget exhausted")
	// ErrRateLimited is 429: wait RetryAfter and try again.
	ErrRateLimited = errors.New("scorer: rate limited")
	// ErrUnavailable is 503: spend control or the upstream is unavailable
	// (breaker open); wait RetryAfter and try again.
	ErrUnavailable = errors.New("scorer: service unavailable")
	// ErrStatus is any other non-200 answer.
	ErrStatus = errors.New("scorer: request failed")
)

// ErrAnswer means a 200 answer could not be used: malformed JSON, a choice
// missing, no log-probabilities.
var ErrAnswer = errors.New("scorer: unusable answer")

// ErrTooLarge means an answer's body exceeded Options.MaxResponseBytes.
var ErrTooLarge = errors.New("scorer: answer too large")

// APIError is a non-200 answer: its status and the wire format's error body
// {"error":{"message","type","code"}} (Message holds the raw body, cut
// short, when it is not that shape).
type APIError struct {
	Status  int
	Type    string
	Code    string
	Message string
	// RetryAfter is the Retry-After header's delay (RFC 9110 §10.2.3), 0
	// when absent or unreadable.
	RetryAfter time.Duration
}

// Error reads "scorer: 429 Too Many Requests (rate_limit_exceeded): message".
func (e *APIError) Error() string {
	s := fmt.Sprintf("scorer: %d %s", e.Status, http.StatusText(e.Status))
	if e.Code != "" {
		s += " (" + e.Code + ")"
	}
	if e.Message != "" {
		s += ": " + e.Message
	}
	return s
}

// Unwrap returns the sentinel for e's status.
func (e *APIError) Unwrap() error {
	switch e.Status {
	case http.StatusPaymentRequired:
		return ErrBudget
	case http.StatusTooManyRequests:
		return ErrRateLimited
	case http.StatusServiceUnavailable:
		return ErrUnavailable
	}
	return ErrStatus
}
