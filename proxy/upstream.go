package proxy

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"strings"
	"time"

	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/plainhttp"
	"github.com/stintlab/stint/proxy/retry"
)

// Upstream is one inference API the proxy forwards misses to.
type Upstream struct {
	// Name identifies the upstream in cache keys, logs and metrics.
	Name string
	// BaseURL is the API's base URL including its version path, as client
	// libraries take it: a request to /v1/completions goes to BaseURL+"/completions".
	BaseURL string
	// Key is the upstream credential, sent as a bearer token. Empty sends none.
	Key string
	// Client sends the requests; nil uses a client with a pooled transport.
	Client *http.Client
	// Timeout bounds one upstream call; zero means 10 minutes. The routed
	// upstream's Timeout also bounds a request's whole upstream exchange,
	// retries and fallbacks included.
	Timeout time.Duration
	// Models routes requests by model name: an exact name, or a prefix ending
	// in "*". Empty matches every model.
	Models []string
	// Breaker configures the upstream's circuit breaker; the zero value is
	// on with package breaker's defaults.
	Breaker breaker.Settings
	// Retry bounds the retries of a failed call routed here; the zero value
	// is package retry's defaults.
	Retry retry.Policy
	// Fallback names upstreams to send a call to, in order, while this
	// one's breaker is open; only those whose Models match the request's
	// model are used. Their answers are cached under this upstream's name,
	// as the routed upstream's. Empty: no fallback.
	Fallback []string
	// MaxConcurrent caps this proxy's calls in flight to the upstream;
	// zero means no cap.
	MaxConcurrent int
	// MaxLogprobs is the most top log-probabilities per token the upstream
	// serves (completions logprobs, chat top_logprobs); a request for more
	// is refused with 400 before it is sent. Zero means
	// DefaultMaxLogprobs.
	MaxLogprobs int

	rt *upstreamState // set by New
}

// DefaultMaxLogprobs is the default of Upstream.MaxLogprobs: what hosted
// chat APIs serve as top_logprobs.
const DefaultMaxLogprobs = 20

func (u *Upstream) maxLogprobs() int {
	if u.MaxLogprobs > 0 {
		return u.MaxLogprobs
	}
	return DefaultMaxLogprobs
}

func (u *Upstream) timeout() time.Duration {
	if u.Timeout > 0 {
		return u.Timeout
	}
	return 10 * time.Minute
}

func (u *Upstream) matches(model string) bool {
	if len(u.Models) == 0 {
		return true
	}
	for _, m := range u.Models {
		if p, ok := strings.CutSuffix(m, "*"); ok {
			if strings.HasPrefix(model, p) {
				return true
			}
		} else if m == model {
			return true
		}
	}
	return false
}

// NewUpstreamClient returns an HTTP client tuned for many concurrent calls to
// one host: plain-HTTP upstreams (a model server nearby) are called inline
// on the request's goroutine (package plainhttp), HTTPS ones through
// net/http's pooled transport.
func NewUpstreamClient() *http.Client {
	t := http.DefaultTransport.(*http.Transport).Clone()
	t.MaxIdleConns = 512
	t.MaxIdleConnsPerHost = 256
	t.IdleConnTimeout = 90 * time.Second
	return &http.Client{Transport: plainhttp.New(plainhttp.Options{Fallback: t})}
}

// upstreamError is a failed call: either a status the upstream answered with
// (passed through to the client with its body) or a transport failure.
type upstreamError struct {
	status int // upstream's own status; 0 for a transport failure
	header http.Header
	body   []byte
	err    error
	// upstream names the upstream called, when known.
	upstream string
}

func (e *upstreamError) Error() string {
	if e.status != 0 {
		return fmt.Sprintf("upstream answered %d", e.status)
	}
	return "upstream call failed: " + e.err.Error()
}

func (e *upstreamError) Unwrap() error { return e.err }

// apiError maps a failure without an upstream answer to its status: 503
// when a breaker is open or no concurrency slot came free (both with
// Retry-After), 504 for a timeout, 502 otherwise.
func (e *upstreamError) apiError() *apiError {
	var oe *breaker.OpenError
	if errors.As(e.err, &oe) {
		return &apiError{status: http.StatusServiceUnavailable, typ: errUpstream, code: "upstream_circuit_open", retryAfter: oe.RetryAfter(time.Now()),
			message: "the upstream is failing and its circuit breaker is open, so nothing was sent: " + oe.Error()}
	}
	var be *busyError
	if errors.As(e.err, &be) {
		return &apiError{status: http.StatusServiceUnavailable, typ: errUpstream, code: "upstream_busy", retryAfter: time.Second,
			message: "no upstream slot came free before the request's deadline, so nothing was sent: " + be.Error()}
	}
	var ne net.Error
	if errors.Is(e.err, context.DeadlineExceeded) || (errors.As(e.err, &ne) && ne.Timeout()) {
		return &apiError{status: http.StatusGatewayTimeout, typ: errUpstream, code: "upstream_timeout", message: "the upstream did not answer in time"}
	}
	name := "the upstream"
	if e.upstream != "" {
		name = fmt.Sprintf("upstream %q", e.upstream)
	}
	return &apiError{status: http.StatusBadGateway, typ: errUpstream, code: "upstream_unreachable", message: name + " could not be reached: " + transportCause(e.err)}
}

// transportCause is the innermost useful text of a transport failure:
// without the layers that each repeat the URL (url.Error, plainhttp's),
// it names the address once ("dial tcp 127.0.0.1:9: connect: connection
// refused").
func transportCause(err error) string {
	var oe *net.OpError
	if errors.As(err, &oe) {
		return oe.Error()
	}
	var ue *url.Error
	if errors.As(err, &ue) {
		return ue.Err.Error()
	}
	return err.Error()
}

// post sends body to the upstream endpoint and returns the response when its
// status is 2xx. Other statuses come back as *upstreamError with the body read.
func (u *Upstream) post(ctx context.Context, ep endpoint, body []byte) (*http.Response, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, strings.TrimSuffix(u.BaseURL, "/")+"/"+string(ep), bytes.NewReader(body))
	if err != nil {
		return nil, &upstreamError{err: err, upstream: u.Name}
	}
	req.Header.Set("Content-Type", "application/json")
	req.Header.Set("Accept", "application/json, text/event-stream")
	if u.Key != "" {
		req.Header.Set("Authorization", "Bearer "+u.Key)
	}
	resp, err := u.client().Do(req)
	if err != nil {
		return nil, &upstreamError{err: err, upstream: u.Name}
	}
	u.scrub(resp)
	if resp.StatusCode/100 != 2 {
		defer resp.Body.Close()
		b, rerr := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
		if rerr != nil {
			return nil, &upstreamError{err: rerr, upstream: u.Name}
		}
		return nil, &upstreamError{status: resp.StatusCode, header: resp.Header, body: b, upstream: u.Name}
	}
	return resp, nil
}

// get fetches a path below the base URL (used for /models).
func (u *Upstream) get(ctx context.Context, path string) ([]byte, int, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, strings.TrimSuffix(u.BaseURL, "/")+path, nil)
	if err != nil {
		return nil, 0, &upstreamError{err: err}
	}
	if u.Key != "" {
		req.Header.Set("Authorization", "Bearer "+u.Key)
	}
	resp, err := u.client().Do(req)
	if err != nil {
		return nil, 0, &upstreamError{err: err}
	}
	u.scrub(resp)
	defer resp.Body.Close()
	b, err := io.ReadAll(io.LimitReader(resp.Body, 8<<20))
	if err != nil {
		return nil, 0, &upstreamError{err: err}
	}
	return b, resp.StatusCode, nil
}

// scrub masks every configured credential in resp's headers and body
// before anything else reads them (see package scrub).
func (u *Upstream) scrub(resp *http.Response) {
	if u.rt == nil || u.rt.scrub == nil {
		return
	}
	u.rt.scrub.Header(resp.Header)
	resp.Body = u.rt.scrub.Reader(resp.Body)
}

func (u *Upstream) client() *http.Client {
	if u.Client != nil {
		return u.Client
	}
	return http.DefaultClient
}
