package proxy_test

import (
	"encoding/json"
	"fmt"
	"net/http"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
)

// TestRunStorageQuota gives each team a 64 KiB run quota: recording stops
// with 403 run_storage_quota_exceeded; a team over its quota (lowered by
// the operator) is refused before the upstream; an import that does not
// fit is refused with 403 too; GET /stint/runs shows what the runs hold
// against the quota; another team records on; deleting a run makes room
// again.
func TestRunStorageQuota(t *testing.T) {
	const quota = 64 << 10
	db, err := bbolt.Open(filepath.Join(t.TempDir(), "runs.db"), 0o600, nil)
	require.NoError(t, err)
	t.Cleanup(func() { _ = db.Close() })
	j, err := runs.NewBolt(db, runs.BoltOptions{QuotaBytes: quota})
	require.NoError(t, err)
	r := newRig(t, withTeams(teamWithKey("lab", "lab-key"), teamWithKey("kiln", "kiln-key")), func(o *proxy.Options) { o.Runs = j })
	r.key = "lab-key"

	var refused response
	recorded := 0
	for i := range 400 {
		got := r.complete(sampled(fmt.Sprintf("a long run, call %d", i), "max_tokens", 64), proxy.HeaderRun, "long")
		if got.status != http.StatusOK {
			refused = got
			break
		}
		recorded++
	}
	require.Equal(t, http.StatusForbidden, refused.status, "recording never stopped: %s", refused.body)
	assert.Equal(t, "run_storage_quota_exceeded", errorCode(t, refused.body))
	assert.Greater(t, recorded, 10)

	var list proxy.RunList
	require.NoError(t, json.Unmarshal(r.get(proxy.RunsPrefix).body, &list))
	assert.EqualValues(t, quota, list.QuotaBytes)
	assert.LessOrEqual(t, list.StoredBytes, int64(quota))
	require.Len(t, list.Runs, 1)
	assert.EqualValues(t, recorded, list.Runs[0].Calls)

	// The operator lowers the quota below what the runs hold: recorded
	// calls are then refused before they are sent (and so before they are
	// paid for); calls outside a run go on.
	lower, err := runs.NewBolt(db, runs.BoltOptions{QuotaBytes: list.StoredBytes / 2})
	require.NoError(t, err)
	r = newRig(t, withTeams(teamWithKey("lab", "lab-key"), teamWithKey("kiln", "kiln-key")), func(o *proxy.Options) { o.Runs = lower })
	r.key = "lab-key"
	got := r.complete(sampled("one more", "max_tokens", 64), proxy.HeaderRun, "long")
	assert.Equal(t, http.StatusForbidden, got.status, "%s", got.body)
	assert.Equal(t, "run_storage_quota_exceeded", errorCode(t, got.body))
	assert.Zero(t, r.upstreamGenerations(), "a team over its quota is refused before the upstream")
	got = r.complete(sampled("not recorded", "max_tokens", 4))
	assert.Equal(t, http.StatusOK, got.status, "a call outside a run: %s", got.body)
	r = newRig(t, withTeams(teamWithKey("lab", "lab-key"), teamWithKey("kiln", "kiln-key")), func(o *proxy.Options) { o.Runs = j })
	r.key = "lab-key"

	// Another team's quota is its own.
	other := r.complete(sampled("kiln's call"), proxy.HeaderRun, "k1", "Authorization", "Bearer kiln-key")
	assert.Equal(t, http.StatusOK, other.status, "another team: %s", other.body)

	// An import that does not fit: 403.
	archive := craftRunArchive(t, "crafted", []craftedCall{{request: canonicalCall, status: 200, ctype: "application/json", size: 40 << 10, mark: 1}})
	got = r.importArchive(archive, "")
	assert.Equal(t, http.StatusForbidden, got.status, "%s", got.body)
	assert.Equal(t, "run_storage_quota_exceeded", errorCode(t, got.body))

	// Deleting the run makes room: the import then fits.
	req, err := http.NewRequest(http.MethodDelete, r.srv.URL+proxy.RunsPrefix+"/long", nil)
	require.NoError(t, err)
	req.Header.Set("Authorization", "Bearer lab-key")
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	resp.Body.Close()
	require.Equal(t, http.StatusOK, resp.StatusCode)
	got = r.importArchive(archive, "")
	assert.Equal(t, http.StatusOK, got.status, "%s", got.body)
}
