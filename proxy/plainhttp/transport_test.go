package plainhttp

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"go.uber.org/goleak"
)

func TestMain(m *testing.M) {
	if runBenchServer() {
		return
	}
	goleak.VerifyTestMain(m)
}

// countingServer is a real HTTP server that counts the connections it
// accepted.
type countingServer struct {
	*httptest.Server
	conns atomic.Int32
}

func newCountingServer(t *testing.T, h http.HandlerFunc) *countingServer {
	t.Helper()
	s := &countingServer{}
	s.Server = httptest.NewUnstartedServer(h)
	s.Config.ConnState = func(_ net.Conn, st http.ConnState) {
		if st == http.StateNew {
			s.conns.Add(1)
		}
	}
	s.Start()
	t.Cleanup(s.Close)
	return s
}

// call posts body to url through tr and returns the status and whole answer.
func call(ctx context.Context, tr http.RoundTripper, url, body string) (int, string, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, url, strings.NewReader(body))
	if err != nil {
		return 0, "", err
	}
	req.Header.Set("Content-Type", "application/json")
	resp, err := tr.RoundTrip(req)
	if err != nil {
		return 0, "", err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b), err
}

func echo(w http.ResponseWriter, r *http.Request) {
	b, _ := io.ReadAll(r.Body)
	w.Header().Set("Content-Type", "application/json")
	fmt.Fprintf(w, `{"path":%q,"got":%q}`, r.URL.Path, b)
}

// TestRoundTripReuse: sequential calls share one connection unless the
// server asks to close it; every answer arrives whole whatever its framing.
func TestRoundTripReuse(t *testing.T) {
	cases := []struct {
		name      string
		handler   http.HandlerFunc
		wantConns int32
	}{
		{"content-length", echo, 1},
		{"chunked", func(w http.ResponseWriter, r *http.Request) {
			b, _ := io.ReadAll(r.Body)
			for _, part := range []string{`{"path":`, fmt.Sprintf("%q", r.URL.Path), `,"got":`, fmt.Sprintf("%q}", b)} {
				_, _ = io.WriteString(w, part)
				w.(http.Flusher).Flush()
			}
		}, 1},
		{"connection close", func(w http.ResponseWriter, r *http.Request) {
			w.Header().Set("Connection", "close")
			echo(w, r)
		}, 5},
		{"early hints first", func(w http.ResponseWriter, r *http.Request) {
			w.Header().Set("Link", "</style.css>; rel=preload")
			w.WriteHeader(http.StatusEarlyHints)
			echo(w, r)
		}, 1},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			srv := newCountingServer(t, tc.handler)
			tr := New(Options{})
			defer tr.CloseIdleConnections()
			for i := range 5 {
				body := fmt.Sprintf("call %d", i)
				status, got, err := call(t.Context(), tr, srv.URL+"/v1/completions", body)
				want := fmt.Sprintf(`{"path":"/v1/completions","got":%q}`, body)
				require.NoError(t, err, "call %d: %d %q %v; want 200 %q", i, status, got, err, want)
				require.Equal(t, http.StatusOK, status, "call %d: %d %q %v; want 200 %q", i, status, got, err, want)
				require.Equal(t, want, got, "call %d: %d %q %v; want 200 %q", i, status, got, err, want)
			}
			n := srv.conns.Load()
			assert.Equal(t, tc.wantConns, n, "server saw %d connections, want %d", n, tc.wantConns)
		})
	}
}

// TestServerClosedIdleConnection: a pooled connection the server has
// closed is noticed before it is used, so the next call still succeeds.
func TestServerClosedIdleConnection(t *testing.T) {
	srv := newCountingServer(t, echo)
	tr := New(Options{})
	defer tr.CloseIdleConnections()
	_, _, err := call(t.Context(), tr, srv.URL, "first")
	require.NoError(t, err)
	srv.CloseClientConnections()
	waitFor(t, "the server to close its side", func() bool {
		tr.mu.Lock()
		defer tr.mu.Unlock()
		for _, list := range tr.idle {
			for _, c := range list {
				if stillOpen(c.Conn) {
					return false
				}
			}
		}
		return true
	})
	status, _, err := call(t.Context(), tr, srv.URL, "second")
	require.NoError(t, err, "call after the server closed the idle connection: %d %v", status, err)
	require.Equal(t, http.StatusOK, status, "call after the server closed the idle connection: %d %v", status, err)
	n := srv.conns.Load()
	assert.Equal(t, int32(2), n, "server saw %d connections, want 2 (the closed one replaced)", n)
}

// TestIdleTimeout: a connection idle longer than IdleTimeout is dropped,
// not reused.
func TestIdleTimeout(t *testing.T) {
	srv := newCountingServer(t, echo)
	tr := New(Options{IdleTimeout: time.Hour})
	defer tr.CloseIdleConnections()
	now := time.Unix(1_800_000_000, 0)
	tr.now = func() time.Time { return now }
	for i, step := range []time.Duration{0, 30 * time.Minute, 2 * time.Hour} {
		now = now.Add(step)
		_, _, err := call(t.Context(), tr, srv.URL, "x")
		require.NoError(t, err, "call %d", i)
	}
	n := srv.conns.Load()
	assert.Equal(t, int32(2), n, "server saw %d connections, want 2 (reused after 30 min, replaced after 2 h)", n)
}

// TestBodyDroppedEarly: a caller that closes the body before its end does
// not get the connection back into the pool, where the rest of that answer
// would corrupt the next one.
func TestBodyDroppedEarly(t *testing.T) {
	srv := newCountingServer(t, func(w http.ResponseWriter, r *http.Request) {
		_, _ = io.WriteString(w, strings.Repeat("x", 64<<10))
	})
	tr := New(Options{})
	defer tr.CloseIdleConnections()
	req, _ := http.NewRequestWithContext(t.Context(), http.MethodGet, srv.URL, nil)
	resp, err := tr.RoundTrip(req)
	require.NoError(t, err)
	_, err = resp.Body.Read(make([]byte, 10))
	require.NoError(t, err)
	resp.Body.Close()
	n := tr.idleCount()
	assert.Equal(t, 0, n, "%d idle connections after an early close, want 0", n)
	status, got, err := call(t.Context(), tr, srv.URL, "")
	require.NoError(t, err, "next call: %d, %d bytes, %v", status, len(got), err)
	require.Equal(t, http.StatusOK, status, "next call: %d, %d bytes, %v", status, len(got), err)
	require.Len(t, got, 64<<10, "next call: %d, %d bytes, %v", status, len(got), err)
	n = tr.idleCount()
	assert.Equal(t, 1, n, "%d idle connections after a whole answer, want 1", n)
}

// TestCancellation: a call whose context ends while the server is silent
// returns the context's error, and its connection is not reused.
func TestCancellation(t *testing.T) {
	release := make(chan struct{})
	var once sync.Once
	t.Cleanup(func() { once.Do(func() { close(release) }) })
	srv := newCountingServer(t, func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path == "/hang" {
			<-release
		}
		echo(w, r)
	})
	cases := []struct {
		name string
		ctx  func() (context.Context, context.CancelFunc)
		want error
	}{
		{"deadline", func() (context.Context, context.CancelFunc) {
			return context.WithTimeout(t.Context(), 50*time.Millisecond)
		}, context.DeadlineExceeded},
		{"cancel", func() (context.Context, context.CancelFunc) {
			ctx, cancel := context.WithCancel(t.Context())
			time.AfterFunc(50*time.Millisecond, cancel)
			return ctx, cancel
		}, context.Canceled},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			tr := New(Options{})
			defer tr.CloseIdleConnections()
			ctx, cancel := tc.ctx()
			defer cancel()
			_, _, err := call(ctx, tr, srv.URL+"/hang", "x")
			require.ErrorIs(t, err, tc.want, "err = %v, want %v", err, tc.want)
			n := tr.idleCount()
			assert.Equal(t, 0, n, "%d idle connections after a cancelled call, want 0", n)
		})
	}
	once.Do(func() { close(release) })
}

// TestStreamArrivesAsSent: an event stream is readable event by event
// while the server is still sending.
func TestStreamArrivesAsSent(t *testing.T) {
	next := make(chan struct{})
	srv := newCountingServer(t, func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "text/event-stream")
		for i := range 3 {
			fmt.Fprintf(w, "data: %d\n\n", i)
			w.(http.Flusher).Flush()
			<-next
		}
		_, _ = io.WriteString(w, "data: [DONE]\n\n")
	})
	tr := New(Options{})
	defer tr.CloseIdleConnections()
	req, _ := http.NewRequestWithContext(t.Context(), http.MethodPost, srv.URL, strings.NewReader("{}"))
	resp, err := tr.RoundTrip(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	sc := bufio.NewScanner(resp.Body)
	for i := range 3 {
		require.True(t, sc.Scan(), "event %d: %q %v", i, sc.Text(), sc.Err())
		require.Equal(t, fmt.Sprintf("data: %d", i), sc.Text(), "event %d: %q %v", i, sc.Text(), sc.Err())
		sc.Scan() // the blank line ending the event
		next <- struct{}{}
	}
	require.True(t, sc.Scan(), "last event: %q %v", sc.Text(), sc.Err())
	require.Equal(t, "data: [DONE]", sc.Text(), "last event: %q %v", sc.Text(), sc.Err())
}

// recordingTransport answers every request itself and remembers it.
type recordingTransport struct{ got atomic.Int32 }

func (rt *recordingTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	rt.got.Add(1)
	return &http.Response{StatusCode: http.StatusTeapot, Body: io.NopCloser(strings.NewReader("fallback")), Request: req}, nil
}

// TestFallback: what the inline path does not carry goes to the fallback.
func TestFallback(t *testing.T) {
	srv := newCountingServer(t, echo)
	proxied := func(*http.Request) (*url.URL, error) { return url.Parse("http://proxy.invalid:3128") }
	direct := func(*http.Request) (*url.URL, error) { return nil, nil }
	cases := []struct {
		name         string
		url          string
		proxy        func(*http.Request) (*url.URL, error)
		wantFallback bool
	}{
		{"plain http", srv.URL, direct, false},
		{"https", "https://api.invalid/v1/completions", direct, true},
		{"through an environment proxy", srv.URL, proxied, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			fb := &recordingTransport{}
			tr := New(Options{Fallback: fb, Proxy: tc.proxy})
			defer tr.CloseIdleConnections()
			status, _, err := call(t.Context(), tr, tc.url, "x")
			require.NoError(t, err)
			got := fb.got.Load() == 1
			assert.Equal(t, tc.wantFallback, got, "fallback used = %v (status %d), want %v", got, status, tc.wantFallback)
			assert.Equal(t, tc.wantFallback, (status == http.StatusTeapot), "fallback used = %v (status %d), want %v", got, status, tc.wantFallback)
		})
	}
}

// TestUnreachable: a refused connection is an error naming the call.
func TestUnreachable(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	addr := ln.Addr().String()
	ln.Close()
	tr := New(Options{})
	_, _, err = call(t.Context(), tr, "http://"+addr+"/v1/completions", "x")
	require.Error(t, err, "err = %v, want a dial error naming the URL", err)
	require.Contains(t, err.Error(), "/v1/completions", "err = %v, want a dial error naming the URL", err)
	var op *net.OpError
	assert.True(t, errors.As(err, &op), "err = %v, want it to wrap the *net.OpError", err)
}

// TestConcurrentCalls: many goroutines share the pool without mixing up
// answers (run with -race).
func TestConcurrentCalls(t *testing.T) {
	srv := newCountingServer(t, echo)
	tr := New(Options{MaxIdlePerHost: 4})
	defer tr.CloseIdleConnections()
	var wg sync.WaitGroup
	errs := make(chan error, 16)
	for g := range 16 {
		wg.Go(func() {
			for i := range 20 {
				body := fmt.Sprintf("g%d-%d", g, i)
				_, got, err := call(t.Context(), tr, srv.URL+"/x", body)
				if want := fmt.Sprintf(`{"path":"/x","got":%q}`, body); err != nil || got != want {
					errs <- fmt.Errorf("%s: %q %v", body, got, err)
					return
				}
			}
		})
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		assert.NoError(t, err)
	}
	n := tr.idleCount()
	assert.LessOrEqual(t, n, 4, "%d idle connections kept, cap 4", n)
}

// idleCount reports the connections tr holds in its pool.
func (tr *Transport) idleCount() int {
	tr.mu.Lock()
	defer tr.mu.Unlock()
	n := 0
	for _, list := range tr.idle {
		n += len(list)
	}
	return n
}

func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for !cond() {
		require.False(t, time.Now().After(deadline), "timed out waiting for %s", what)
		time.Sleep(time.Millisecond)
	}
}

// TestCancelledWhileReadingBody: a context that ends mid-answer shows as
// the context's error from Read.
func TestCancelledWhileReadingBody(t *testing.T) {
	hold := make(chan struct{})
	defer close(hold)
	srv := newCountingServer(t, func(w http.ResponseWriter, r *http.Request) {
		_, _ = io.WriteString(w, "data: 0\n\n")
		w.(http.Flusher).Flush()
		select {
		case <-hold:
		case <-r.Context().Done():
		}
	})
	tr := New(Options{})
	defer tr.CloseIdleConnections()
	ctx, cancel := context.WithCancel(t.Context())
	req, _ := http.NewRequestWithContext(ctx, http.MethodGet, srv.URL, nil)
	resp, err := tr.RoundTrip(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	buf := make([]byte, 9)
	_, err = io.ReadFull(resp.Body, buf)
	require.NoError(t, err)
	time.AfterFunc(20*time.Millisecond, cancel)
	_, err = resp.Body.Read(buf)
	require.ErrorIs(t, err, context.Canceled, "read after cancel: %v, want context.Canceled", err)
}

// TestNoBodyAnswerReturnsConnection: an answer without a body gives its
// connection back at once, even if the caller only closes it.
func TestNoBodyAnswerReturnsConnection(t *testing.T) {
	srv := newCountingServer(t, func(w http.ResponseWriter, r *http.Request) {
		w.WriteHeader(http.StatusNoContent)
	})
	tr := New(Options{})
	defer tr.CloseIdleConnections()
	for i := range 3 {
		req, _ := http.NewRequestWithContext(t.Context(), http.MethodPost, srv.URL, strings.NewReader("x"))
		resp, err := tr.RoundTrip(req)
		require.NoError(t, err, "call %d: %v %v", i, resp, err)
		require.Equal(t, http.StatusNoContent, resp.StatusCode, "call %d: %v %v", i, resp, err)
		resp.Body.Close()
	}
	n := srv.conns.Load()
	assert.Equal(t, int32(1), n, "server saw %d connections, want 1", n)
}
