package localmodel

import (
	"bufio"
	"bytes"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/wire"
)

// modelPath finds the real model file (see modeltest). The
// download-from-public-source path cannot run here: there is no internet;
// TestFetch exercises it against a loopback server instead.
func modelPath(tb testing.TB) string {
	tb.Helper()
	return modeltest.Path(tb)
}

func loadModel(tb testing.TB) *Model {
	tb.Helper()
	m, err := Load(modelPath(tb))
	if err != nil {
		tb.Fatal(err)
	}
	return m
}

// testServer starts the handler on a loopback httptest server.
func testServer(tb testing.TB, m *Model, opts HandlerOptions) (*httptest.Server, *handler) {
	tb.Helper()
	h := NewHandler(m, opts)
	srv := httptest.NewServer(h)
	tb.Cleanup(srv.Close)
	return srv, h.(*handler)
}

// post sends body as JSON and returns the status and raw response.
func post(tb testing.TB, url string, body any) (int, []byte, http.Header) {
	tb.Helper()
	var rd io.Reader
	switch b := body.(type) {
	case string:
		rd = strings.NewReader(b)
	default:
		j, err := json.Marshal(b)
		if err != nil {
			tb.Fatal(err)
		}
		rd = bytes.NewReader(j)
	}
	resp, err := http.Post(url, "application/json", rd)
	if err != nil {
		tb.Fatal(err)
	}
	defer resp.Body.Close()
	out, err := io.ReadAll(resp.Body)
	if err != nil {
		tb.Fatal(err)
	}
	return resp.StatusCode, out, resp.Header
}

// complete posts a completions request that must succeed.
func complete(tb testing.TB, srv *httptest.Server, body any) wire.CompletionResponse {
	tb.Helper()
	status, out, _ := post(tb, srv.URL+"/v1/completions", body)
	if status != http.StatusOK {
		tb.Fatalf("status %d: %s", status, out)
	}
	var r wire.CompletionResponse
	if err := json.Unmarshal(out, &r); err != nil {
		tb.Fatalf("decode %s: %v", out, err)
	}
	return r
}

// sseEvents reads a server-sent-event stream into its data payloads.
func sseEvents(tb testing.TB, r io.Reader) []string {
	tb.Helper()
	var events []string
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 1<<20), 1<<24)
	for sc.Scan() {
		line := sc.Text()
		if line == "" {
			continue
		}
		data, ok := strings.CutPrefix(line, "data: ")
		if !ok {
			tb.Fatalf("unexpected SSE line %q", line)
		}
		events = append(events, data)
	}
	if err := sc.Err(); err != nil {
		tb.Fatal(err)
	}
	return events
}

func stream(tb testing.TB, url string, body any) ([]string, http.Header) {
	tb.Helper()
	j, _ := json.Marshal(body)
	resp, err := http.Post(url, "application/json", bytes.NewReader(j))
	if err != nil {
		tb.Fatal(err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		b, _ := io.ReadAll(resp.Body)
		tb.Fatalf("status %d: %s", resp.StatusCode, b)
	}
	return sseEvents(tb, resp.Body), resp.Header
}
