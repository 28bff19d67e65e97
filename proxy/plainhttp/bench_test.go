package plainhttp

import (
	"bufio"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"os/exec"
	"strings"
	"testing"
)

// serverEnv makes the test binary a plain answering server instead of
// running tests: the round-trip benchmark's upstream, in a process of its
// own as a real upstream is (in-process, the server's goroutines would
// share the scheduler with the client's and blur the difference).
const serverEnv = "PLAINHTTP_BENCH_SERVER"

// runBenchServer serves when the binary was started as the benchmark's
// upstream, and reports whether it was.
func runBenchServer() bool {
	if os.Getenv(serverEnv) == "" {
		return false
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	fmt.Println(ln.Addr().String())
	answer := strings.Repeat("a", 300)
	_ = http.Serve(ln, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		_, _ = io.Copy(io.Discard, r.Body)
		_, _ = io.WriteString(w, answer)
	}))
	return true
}

// startBenchServer runs this test binary as the upstream and returns its
// address.
func startBenchServer(b *testing.B) string {
	b.Helper()
	cmd := exec.Command(os.Args[0])
	cmd.Env = append(os.Environ(), serverEnv+"=1")
	out, err := cmd.StdoutPipe()
	if err != nil {
		b.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = cmd.Process.Kill(); _ = cmd.Wait() })
	addr, err := bufio.NewReader(out).ReadString('\n')
	if err != nil {
		b.Fatalf("benchmark upstream did not start: %v", err)
	}
	return strings.TrimSpace(addr)
}

// BenchmarkRoundTrip is one sequential POST and its whole 300-byte answer
// to an upstream in another process on loopback, through net/http's
// transport and through this one: the difference is the goroutine
// hand-offs saved.
func BenchmarkRoundTrip(b *testing.B) {
	url := "http://" + startBenchServer(b) + "/v1/completions"
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
				if _, got, err := call(b.Context(), tc.tr, url, `{"prompt":"x"}`); err != nil || len(got) != 300 {
					b.Fatalf("%d bytes, %v", len(got), err)
				}
			}
		})
	}
}
