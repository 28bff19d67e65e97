package proxy

import (
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// A call that gets no slot under max_concurrent before its upstream
// deadline is answered 503 upstream_busy with Retry-After: 1, and nothing
// reaches the upstream. The slot is taken from inside, so the wait is the
// whole deadline without racing another call's timeout.
func TestNoSlotBeforeTheDeadlineIs503Busy(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	t.Cleanup(up.Close)
	store, err := boltstore.Open(filepath.Join(t.TempDir(), "stint.db"), boltstore.Options{})
	require.NoError(t, err)
	t.Cleanup(func() { _ = store.Close() })
	p, err := New(Options{Store: store, Upstreams: []Upstream{{Name: "capped", BaseURL: up.URL(), Timeout: 100 * time.Millisecond, MaxConcurrent: 1}}})
	require.NoError(t, err)
	p.upstreams[0].rt.slots <- struct{}{} // the one slot is busy
	rec := httptest.NewRecorder()
	req := httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(`{"model":"quill-small","prompt":"wait your turn","temperature":0}`))
	p.ServeHTTP(rec, req)
	require.Equal(t, http.StatusServiceUnavailable, rec.Code, "status %d %s, want 503 upstream_busy", rec.Code, rec.Body)
	require.Contains(t, rec.Body.String(), `"upstream_busy"`, "status %d %s, want 503 upstream_busy", rec.Code, rec.Body)
	ra := rec.Header().Get("Retry-After")
	assert.Equal(t, "1", ra, "Retry-After %q, want 1", ra)
	n := up.Calls().Total()
	assert.Equal(t, 0, n, "upstream saw %d calls, want 0", n)
	<-p.upstreams[0].rt.slots
	rec = httptest.NewRecorder()
	p.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(`{"model":"quill-small","prompt":"wait your turn","temperature":0}`)))
	assert.Equal(t, http.StatusOK, rec.Code, "with the slot free: %d %s", rec.Code, rec.Body)
}
