package plainhttp

import (
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
)

// BenchmarkRoundTrip is one sequential POST and its whole answer to a
// loopback server, through net/http's transport and through this one, in
// one run: the difference is the goroutine hand-offs saved.
func BenchmarkRoundTrip(b *testing.B) {
	answer := strings.Repeat("a", 300)
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		_, _ = io.Copy(io.Discard, r.Body)
		_, _ = io.WriteString(w, answer)
	}))
	defer srv.Close()
	cases := []struct {
		name string
		tr   http.RoundTripper
	}{
		{"nethttp", http.DefaultTransport.(*http.Transport).Clone()},
		{"plainhttp", New(Options{})},
	}
	for _, tc := range cases {
		b.Run(tc.name, func(b *testing.B) {
			defer tc.tr.(interface{ CloseIdleConnections() }).CloseIdleConnections()
			b.ReportAllocs()
			for b.Loop() {
				if _, got, err := call(b.Context(), tc.tr, srv.URL+"/v1/completions", `{"prompt":"x"}`); err != nil || len(got) != len(answer) {
					b.Fatalf("%d bytes, %v", len(got), err)
				}
			}
		})
	}
}
