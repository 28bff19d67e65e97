package main

import (
	"context"
	"net"
	"net/http"
	"net/http/httptest"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestCheck(t *testing.T) {
	hold := make(chan struct{})
	defer close(hold)
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		switch r.URL.Path {
		case "/healthz":
			_, _ = w.Write([]byte("ok\n"))
		case "/readyz":
			http.Error(w, "draining", http.StatusServiceUnavailable)
		case "/moved":
			http.Redirect(w, r, "/readyz", http.StatusFound)
		case "/hang":
			select {
			case <-hold:
			case <-r.Context().Done():
			}
		default:
			http.NotFound(w, r)
		}
	}))
	defer srv.Close()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	closedURL := "http://" + ln.Addr().String() + "/healthz"
	ln.Close()

	tests := []struct {
		name    string
		url     string
		wantErr string // "" for success
		isCtx   bool
	}{
		{"2xx", srv.URL + "/healthz", "", false},
		{"503 while draining", srv.URL + "/readyz", "503 Service Unavailable", false},
		{"redirect to a 503", srv.URL + "/moved", "503 Service Unavailable", false},
		{"404", srv.URL + "/nothing", "404 Not Found", false},
		{"nothing listening", closedURL, "connection refused", false},
		{"no answer in time", srv.URL + "/hang", "", true},
		{"not a URL", "http://[::1", "bad URL", false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
			defer cancel()
			err := check(ctx, srv.Client(), tc.url)
			switch {
			case tc.isCtx:
				assert.ErrorIs(t, err, context.DeadlineExceeded, "got %v, want the deadline", err)
			case tc.wantErr == "":
				assert.NoError(t, err, "want success")
			default:
				assert.ErrorContains(t, err, tc.wantErr)
			}
		})
	}
}
