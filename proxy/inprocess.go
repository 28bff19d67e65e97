package proxy

import (
	"fmt"
	"io"
	"net/http"
	"sync"
)

// HandlerTransport returns an http.RoundTripper that answers requests by
// calling h directly in this process, with no network hop. The answer body
// is streamed through a pipe, so event streams arrive as h writes them. It is
// how `stint serve --upstream local:MODEL` runs the local model as its
// upstream.
func HandlerTransport(h http.Handler) http.RoundTripper { return handlerTransport{h} }

type handlerTransport struct{ h http.Handler }

func (t handlerTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	if req.Body == nil {
		req.Body = http.NoBody
	}
	pr, pw := io.Pipe()
	w := &pipeResponse{header: http.Header{}, pw: pw, ready: make(chan struct{})}
	go func() {
		defer func() {
			if rec := recover(); rec != nil && rec != http.ErrAbortHandler {
				w.WriteHeader(http.StatusInternalServerError)
				_ = pw.CloseWithError(fmt.Errorf("in-process handler panicked: %v", rec))
				return
			}
			w.WriteHeader(http.StatusOK) // no-op when the handler wrote one
			_ = pw.Close()
		}()
		t.h.ServeHTTP(w, req)
	}()
	select {
	case <-w.ready:
	case <-req.Context().Done():
		_ = pr.CloseWithError(req.Context().Err())
		return nil, req.Context().Err()
	}
	return &http.Response{
		Status:     fmt.Sprintf("%d %s", w.status, http.StatusText(w.status)),
		StatusCode: w.status,
		Proto:      "HTTP/1.1", ProtoMajor: 1, ProtoMinor: 1,
		Header:        w.sent,
		Body:          pr,
		ContentLength: -1,
		Request:       req,
	}, nil
}

// pipeResponse is the http.ResponseWriter the in-process handler writes to.
type pipeResponse struct {
	header http.Header
	pw     *io.PipeWriter
	once   sync.Once
	ready  chan struct{} // closed once the status and headers are fixed
	status int
	sent   http.Header
}

func (w *pipeResponse) Header() http.Header { return w.header }

func (w *pipeResponse) WriteHeader(code int) {
	w.once.Do(func() {
		w.status, w.sent = code, w.header.Clone()
		close(w.ready)
	})
}

func (w *pipeResponse) Write(b []byte) (int, error) {
	w.WriteHeader(http.StatusOK)
	return w.pw.Write(b)
}

// Flush is a no-op: every Write reaches the reader directly.
func (w *pipeResponse) Flush() {}
