package localmodel

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/sse"
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
	require.NoError(tb, err)
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
		require.NoError(tb, err)
		rd = bytes.NewReader(j)
	}
	resp, err := http.Post(url, "application/json", rd)
	require.NoError(tb, err)
	defer resp.Body.Close()
	out, err := io.ReadAll(resp.Body)
	require.NoError(tb, err)
	return resp.StatusCode, out, resp.Header
}

// complete posts a completions request that must succeed.
func complete(tb testing.TB, srv *httptest.Server, body any) wire.CompletionResponse {
	tb.Helper()
	status, out, _ := post(tb, srv.URL+"/v1/completions", body)
	require.Equal(tb, http.StatusOK, status, "%s", out)
	var r wire.CompletionResponse
	require.NoError(tb, json.Unmarshal(out, &r), "decode %s", out)
	return r
}

// sseEvents reads a server-sent-event stream (with proxy/sse's reader)
// into its data payloads; every event must be data only.
func sseEvents(tb testing.TB, r io.Reader) []string {
	tb.Helper()
	var events []string
	rd := sse.NewReader(r)
	for {
		e, err := rd.Next()
		if errors.Is(err, io.EOF) {
			return events
		}
		require.NoError(tb, err)
		require.Empty(tb, e.Name, "event with a name: %+v", e)
		events = append(events, e.Data)
	}
}

func stream(tb testing.TB, url string, body any) ([]string, http.Header) {
	tb.Helper()
	j, err := json.Marshal(body)
	require.NoError(tb, err)
	resp, err := http.Post(url, "application/json", bytes.NewReader(j))
	require.NoError(tb, err)
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		b, _ := io.ReadAll(resp.Body)
		require.Failf(tb, "stream refused", "status %d: %s", resp.StatusCode, b)
	}
	return sseEvents(tb, resp.Body), resp.Header
}
