package proxy

import (
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"testing"
	"time"

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
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = store.Close() })
	p, err := New(Options{Store: store, Upstreams: []Upstream{{Name: "capped", BaseURL: up.URL(), Timeout: 100 * time.Millisecond, MaxConcurrent: 1}}})
	if err != nil {
		t.Fatal(err)
	}
	p.upstreams[0].rt.slots <- struct{}{} // the one slot is busy
	rec := httptest.NewRecorder()
	req := httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(`{"model":"quill-small","prompt":"wait your turn","temperature":0}`))
	p.ServeHTTP(rec, req)
	if rec.Code != http.StatusServiceUnavailable || !strings.Contains(rec.Body.String(), `"upstream_busy"`) {
		t.Fatalf("status %d %s, want 503 upstream_busy", rec.Code, rec.Body)
	}
	if ra := rec.Header().Get("Retry-After"); ra != "1" {
		t.Errorf("Retry-After %q, want 1", ra)
	}
	if n := up.Calls().Total(); n != 0 {
		t.Errorf("upstream saw %d calls, want 0", n)
	}
	<-p.upstreams[0].rt.slots
	rec = httptest.NewRecorder()
	p.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(`{"model":"quill-small","prompt":"wait your turn","temperature":0}`)))
	if rec.Code != http.StatusOK {
		t.Errorf("with the slot free: %d %s", rec.Code, rec.Body)
	}
}
