// Package plainhttp is an http.RoundTripper for plain-HTTP/1.1 upstreams
// (a model server on the same host or in the same cluster) that writes each
// request and reads its response on the calling goroutine, over pooled
// keep-alive connections.
//
// net/http's Transport hands every call to two connection goroutines, a
// writer and a reader, and back; on a small virtual machine those wake-ups
// are most of a loopback call's cost. Here a call takes an idle connection,
// writes with http.Request.Write and reads with http.ReadResponse, so the
// standard library still does all the framing; this package only keeps the
// connections. HTTPS, and any URL that the environment's proxy settings
// route through a proxy, go to the fallback transport unchanged.
package plainhttp

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"os"
	"sync"
	"time"
)

// Options tunes a Transport; the zero value gives the defaults noted.
type Options struct {
	// Fallback carries what this transport does not: HTTPS, proxied URLs,
	// other schemes. Nil means a clone of http.DefaultTransport.
	Fallback http.RoundTripper
	// MaxIdlePerHost caps the idle connections kept per host; zero means 256.
	MaxIdlePerHost int
	// IdleTimeout drops a connection idle longer than this instead of
	// reusing it; zero means 60 seconds (below the usual server keep-alive
	// limit of 75–90 s, so the server is not the first to close).
	IdleTimeout time.Duration
	// DialTimeout bounds connecting; zero means 30 seconds.
	DialTimeout time.Duration
	// Proxy reports the proxy for a request, as http.Transport.Proxy does;
	// a request it routes through a proxy goes to Fallback. Nil means
	// http.ProxyFromEnvironment.
	Proxy func(*http.Request) (*url.URL, error)
}

// Transport is the inline round tripper. It is safe for concurrent use.
type Transport struct {
	fallback    http.RoundTripper
	maxIdle     int
	idleTimeout time.Duration
	dialer      net.Dialer
	proxy       func(*http.Request) (*url.URL, error)
	now         func() time.Time

	mu   sync.Mutex // guards idle
	idle map[string][]*conn
}

// New returns a Transport with opts.
func New(opts Options) *Transport {
	t := &Transport{
		fallback:    opts.Fallback,
		maxIdle:     opts.MaxIdlePerHost,
		idleTimeout: opts.IdleTimeout,
		proxy:       opts.Proxy,
		now:         time.Now,
		idle:        map[string][]*conn{},
	}
	if t.fallback == nil {
		t.fallback = http.DefaultTransport.(*http.Transport).Clone()
	}
	if t.maxIdle <= 0 {
		t.maxIdle = 256
	}
	if t.idleTimeout <= 0 {
		t.idleTimeout = 60 * time.Second
	}
	t.dialer.Timeout = opts.DialTimeout
	if t.dialer.Timeout <= 0 {
		t.dialer.Timeout = 30 * time.Second
	}
	if t.proxy == nil {
		t.proxy = http.ProxyFromEnvironment
	}
	return t
}

// conn is one pooled connection with its buffers.
type conn struct {
	net.Conn
	addr     string // the pool's key: the dial address
	br       *bufio.Reader
	bw       *bufio.Writer
	idleFrom time.Time
}

// RoundTrip sends req. Plain-HTTP requests not routed through a proxy are
// sent inline; the rest go to the fallback transport.
func (t *Transport) RoundTrip(req *http.Request) (*http.Response, error) {
	if req.URL == nil || req.URL.Scheme != "http" {
		return t.fallback.RoundTrip(req)
	}
	if pu, err := t.proxy(req); err != nil || pu != nil {
		return t.fallback.RoundTrip(req)
	}
	ctx := req.Context()
	addr := hostPort(req.URL)
	c, err := t.get(ctx, addr)
	if err != nil {
		closeBody(req)
		return nil, callError(ctx, req, err)
	}
	resp, err := t.exchange(ctx, c, req)
	if err != nil {
		_ = c.Close()
		return nil, callError(ctx, req, err)
	}
	return resp, nil
}

// callError names the failed call; a call ended by its context reports the
// context's error (the deadline it hit shows as an i/o timeout otherwise).
func callError(ctx context.Context, req *http.Request, err error) error {
	if cerr := ended(ctx, err); cerr != nil {
		return fmt.Errorf("plainhttp: %s %s: %w (%w)", req.Method, req.URL.Redacted(), cerr, err)
	}
	return fmt.Errorf("plainhttp: %s %s: %w", req.Method, req.URL.Redacted(), err)
}

// exchange writes req on c and reads the response head; the body is read by
// the caller through the returned response, which gives c back to the pool
// when it has been read to the end.
func (t *Transport) exchange(ctx context.Context, c *conn, req *http.Request) (*http.Response, error) {
	if d, ok := ctx.Deadline(); ok {
		if err := c.SetDeadline(d); err != nil {
			closeBody(req)
			return nil, err
		}
	}
	// Cancellation interrupts whatever the call is blocked on by moving the
	// deadline into the past; AfterFunc starts no goroutine unless it fires.
	stop := context.AfterFunc(ctx, func() { _ = c.SetDeadline(time.Unix(1, 0)) })
	if err := req.Write(c.bw); err != nil {
		stop()
		return nil, err
	}
	if err := c.bw.Flush(); err != nil {
		stop()
		return nil, err
	}
	for {
		resp, err := http.ReadResponse(c.br, req)
		if err != nil {
			stop()
			return nil, err
		}
		// Informational answers (103 Early Hints and the like) precede the
		// real one; 101 would switch protocols, which no caller asks for.
		if resp.StatusCode >= 100 && resp.StatusCode < 200 && resp.StatusCode != http.StatusSwitchingProtocols {
			continue
		}
		b := &body{ReadCloser: resp.Body, ctx: ctx, t: t, c: c, stop: stop, keep: !resp.Close && !req.Close}
		if resp.Body == http.NoBody {
			// A 204, 304 or zero-length answer is whole already: the
			// connection goes back now, not when (or if) it is closed.
			b.finish(true)
			return resp, nil
		}
		resp.Body = b
		return resp, nil
	}
}

// body gives its connection back to the pool once read to the end, and
// closes it if dropped early.
type body struct {
	io.ReadCloser
	ctx  context.Context
	t    *Transport
	c    *conn
	stop func() bool
	keep bool
	done bool
}

func (b *body) Read(p []byte) (int, error) {
	if b.done {
		return 0, io.EOF
	}
	n, err := b.ReadCloser.Read(p)
	if err == io.EOF {
		b.finish(true)
	} else if err != nil {
		b.finish(false)
		if cerr := ended(b.ctx, err); cerr != nil {
			err = fmt.Errorf("plainhttp: reading the answer: %w (%w)", cerr, err)
		}
	}
	return n, err
}

func (b *body) Close() error {
	if !b.done {
		b.finish(false)
	}
	return nil
}

// finish ends the call: a connection whose answer was read whole, whose
// cancellation did not fire and that the server did not mark for closing
// goes back to the pool.
func (b *body) finish(whole bool) {
	b.done = true
	cancelled := !b.stop()
	if whole && b.keep && !cancelled && b.c.SetDeadline(time.Time{}) == nil {
		b.t.put(b.c)
		return
	}
	_ = b.c.Close()
}

// get returns an idle connection to addr that is still open, or dials one.
func (t *Transport) get(ctx context.Context, addr string) (*conn, error) {
	now := t.now()
	for {
		t.mu.Lock()
		list := t.idle[addr]
		if len(list) == 0 {
			t.mu.Unlock()
			break
		}
		c := list[len(list)-1]
		list[len(list)-1] = nil
		t.idle[addr] = list[:len(list)-1]
		t.mu.Unlock()
		if now.Sub(c.idleFrom) < t.idleTimeout && stillOpen(c.Conn) {
			return c, nil
		}
		_ = c.Close()
	}
	nc, err := t.dialer.DialContext(ctx, "tcp", addr)
	if err != nil {
		return nil, err
	}
	return &conn{Conn: nc, addr: addr, br: bufio.NewReaderSize(nc, 8<<10), bw: bufio.NewWriterSize(nc, 8<<10)}, nil
}

// put keeps c for reuse, unless the host's idle list is full.
func (t *Transport) put(c *conn) {
	c.idleFrom = t.now()
	t.mu.Lock()
	if len(t.idle[c.addr]) < t.maxIdle {
		t.idle[c.addr] = append(t.idle[c.addr], c)
		c = nil
	}
	t.mu.Unlock()
	if c != nil {
		_ = c.Close()
	}
}

// CloseIdleConnections closes the pooled connections, as
// http.Client.CloseIdleConnections expects, and the fallback's.
func (t *Transport) CloseIdleConnections() {
	t.mu.Lock()
	idle := t.idle
	t.idle = map[string][]*conn{}
	t.mu.Unlock()
	for _, list := range idle {
		for _, c := range list {
			_ = c.Close()
		}
	}
	if ci, ok := t.fallback.(interface{ CloseIdleConnections() }); ok {
		ci.CloseIdleConnections()
	}
}

// ended reports the context error behind err: ctx's own, or its deadline
// when err is the connection deadline set from it firing a moment before
// the context's timer.
func ended(ctx context.Context, err error) error {
	if cerr := ctx.Err(); cerr != nil {
		return cerr
	}
	if _, ok := ctx.Deadline(); ok && errors.Is(err, os.ErrDeadlineExceeded) {
		return context.DeadlineExceeded
	}
	return nil
}

// hostPort is the dial address of u: its host with the port, 80 by default.
func hostPort(u *url.URL) string {
	port := u.Port()
	if port == "" {
		port = "80"
	}
	return net.JoinHostPort(u.Hostname(), port)
}

func closeBody(req *http.Request) {
	if req.Body != nil {
		_ = req.Body.Close()
	}
}
