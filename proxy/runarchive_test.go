package proxy_test

import (
	"archive/tar"
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"testing"
	"time"

	"github.com/klauspost/compress/zstd"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

// craftedCall is one call of a hand-made run archive: the request body
// (canonical JSON, so its run key is easy to derive) and the answer the
// archive claims it got. A body of size > 0 is mark and then zeros.
type craftedCall struct {
	request string
	status  int
	ctype   string
	stream  bool
	body    []byte
	size    int64
	mark    byte
}

func (c craftedCall) answer() io.Reader {
	if c.size == 0 {
		return bytes.NewReader(c.body)
	}
	return io.MultiReader(bytes.NewReader([]byte{c.mark}), io.LimitReader(zeroReader{}, c.size-1))
}

func (c craftedCall) length() int64 {
	if c.size == 0 {
		return int64(len(c.body))
	}
	return c.size
}

type zeroReader struct{}

func (zeroReader) Read(p []byte) (int, error) { clear(p); return len(p), nil }

// runKeyOf is the run key the proxy derives for a completions call with
// this canonical body.
func runKeyOf(canonical string) string {
	sum := sha256.Sum256([]byte("stint-run-call\ncompletions\n" + canonical))
	return hex.EncodeToString(sum[:])
}

// craftRunArchive writes a well-formed archive of run id holding calls, as
// a hostile team could: every check of the format passes, whatever the
// answers claim. Bodies are streamed through the compressor, never held.
func craftRunArchive(t *testing.T, run string, calls []craftedCall) []byte {
	t.Helper()
	type member struct {
		Name   string `json:"name"`
		Size   int64  `json:"size"`
		SHA256 string `json:"sha256"`
	}
	var (
		entries bytes.Buffer
		members []member
		total   int64
		seen    = map[string]bool{}
		bodies  []int // index of the call whose body each body member is
	)
	base := time.Date(2026, 4, 1, 10, 0, 0, 0, time.UTC)
	occ := map[string]int{}
	for i, c := range calls {
		h := sha256.New()
		_, err := io.Copy(h, c.answer())
		require.NoError(t, err)
		ref := hex.EncodeToString(h.Sum(nil))
		if !seen[ref] {
			seen[ref] = true
			members = append(members, member{Name: "bodies/" + ref, Size: c.length(), SHA256: ref})
			bodies = append(bodies, i)
			total += c.length()
		}
		key := runKeyOf(c.request)
		occ[key]++
		line, err := json.Marshal(map[string]any{"seq": i + 1, "key": key, "occurrence": occ[key], "ref": ref, "status": c.status,
			"content_type": c.ctype, "stream": c.stream, "outcome": "miss", "upstream": true, "cost_nanos": 0, "saved_nanos": 0,
			"model": model, "time": base.Add(time.Duration(i) * time.Second)})
		require.NoError(t, err)
		entries.Write(append(line, '\n'))
	}
	sum := sha256.Sum256(entries.Bytes())
	members = append([]member{{Name: "entries", Size: int64(entries.Len()), SHA256: hex.EncodeToString(sum[:])}}, members...)
	n := len(calls)
	man, err := json.Marshal(map[string]any{
		"format": "stint-run-archive", "version": 1, "team": "hostile", "run": run, "created": base, "entries": n,
		"summary": map[string]any{"first": base, "last": base.Add(time.Duration(n-1) * time.Second), "calls": n, "upstream": n,
			"cost_nanos": 0, "saved_nanos": 0, "keys": len(occ), "bodies": len(bodies), "bytes": total},
		"members": members,
	})
	require.NoError(t, err)
	var out bytes.Buffer
	zw, err := zstd.NewWriter(&out)
	require.NoError(t, err)
	tw := tar.NewWriter(zw)
	put := func(name string, size int64, r io.Reader) {
		require.NoError(t, tw.WriteHeader(&tar.Header{Name: name, Typeflag: tar.TypeReg, Size: size, Mode: 0o644, Format: tar.FormatUSTAR}))
		_, err := io.Copy(tw, r)
		require.NoError(t, err)
	}
	put("manifest.json", int64(len(man)), bytes.NewReader(man))
	put("entries", int64(entries.Len()), &entries)
	for j, i := range bodies {
		put(members[j+1].Name, calls[i].length(), calls[i].answer())
	}
	require.NoError(t, tw.Close())
	require.NoError(t, zw.Close())
	// The trailer: a zstd skippable frame holding the SHA-256 of the rest.
	b := out.Bytes()
	tsum := sha256.Sum256(b)
	return append(append(b, 0x5e, 0x2a, 0x4d, 0x18, 32, 0, 0, 0), tsum[:]...)
}

// importArchive posts an archive to the rig's import endpoint.
func (r *rig) importArchive(archive []byte, query string) response {
	r.t.Helper()
	req, err := http.NewRequest(http.MethodPost, r.srv.URL+proxy.RunsPrefix+"/import"+query, bytes.NewReader(archive))
	require.NoError(r.t, err)
	req.Header.Set("Authorization", "Bearer "+r.key)
	resp, err := http.DefaultClient.Do(req)
	require.NoError(r.t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return response{status: resp.StatusCode, header: resp.Header, body: b, readErr: err}
}

// canonicalCall is a request body in canonical form and as a map.
const canonicalCall = `{"max_tokens":4,"model":"quill-small","prompt":"the crafted call","temperature":0}`

// TestRunImportRefusesWhatNoRecordingProduces imports hand-made archives
// whose answer no recording of the wire format has: each is refused with
// 400 and imports nothing, so replay can never answer with it. An archive
// of the same call with a JSON 200 answer imports and replays, marked
// nosniff.
func TestRunImportRefusesWhatNoRecordingProduces(t *testing.T) {
	r := newRunRig(t)
	html := []byte(`<html><script>alert(document.cookie)</script></html>`)
	tests := []struct {
		name   string
		status int
		ctype  string
		body   []byte
	}{
		{"101 switching protocols", 101, "application/json", []byte(`{}`)},
		{"204 no content", 204, "application/json", []byte(`{}`)},
		{"304 not modified", 304, "application/json", []byte(`{}`)},
		{"999", 999, "application/json", []byte(`{}`)},
		{"text/html with a script", 200, "text/html", html},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			archive := craftRunArchive(t, "crafted", []craftedCall{{request: canonicalCall, status: tt.status, ctype: tt.ctype, body: tt.body}})
			got := r.importArchive(archive, "")
			assert.Equal(t, http.StatusBadRequest, got.status, "%s", got.body)
			assert.Equal(t, "corrupt_archive", errorCode(t, got.body))
			replay := r.complete(canonicalCall, proxy.HeaderRun, "crafted", proxy.HeaderRunMode, "replay")
			assert.Equal(t, http.StatusNotFound, replay.status, "replay answered %d %q: %s", replay.status, replay.header.Get("Content-Type"), replay.body)
		})
	}
	archive := craftRunArchive(t, "crafted", []craftedCall{{request: canonicalCall, status: 200, ctype: "application/json", body: []byte(`{"choices":[]}`)}})
	got := r.importArchive(archive, "")
	require.Equal(t, http.StatusOK, got.status, "%s", got.body)
	replay := r.complete(canonicalCall, proxy.HeaderRun, "crafted", proxy.HeaderRunMode, "replay")
	assert.Equal(t, http.StatusOK, replay.status)
	assert.Equal(t, `{"choices":[]}`, string(replay.body))
	assert.Equal(t, "nosniff", replay.header.Get("X-Content-Type-Options"))
}

// TestRunImportOfABombIsRefused uploads what the reliability trial did: a
// small archive (tens of KB) of seven highly compressible 63 MB bodies,
// 440 MB inflated. The proxy's default limits refuse it with 413 before
// inflating any body, and the team's journal holds nothing.
func TestRunImportOfABombIsRefused(t *testing.T) {
	r := newRunRig(t)
	var calls []craftedCall
	for i := range 7 {
		calls = append(calls, craftedCall{request: fmt.Sprintf(`{"model":"quill-small","prompt":"bomb %d","temperature":0}`, i),
			status: 200, ctype: "application/json", size: 63 << 20, mark: byte(i + 1)})
	}
	archive := craftRunArchive(t, "bomb", calls)
	t.Logf("the archive is %d bytes, its bodies %d MB", len(archive), 7*63)
	got := r.importArchive(archive, "")
	assert.Equal(t, http.StatusRequestEntityTooLarge, got.status, "%s", got.body)
	assert.Equal(t, "archive_too_large", errorCode(t, got.body))
	var list proxy.RunList
	require.NoError(t, json.Unmarshal(r.get(proxy.RunsPrefix).body, &list))
	assert.Empty(t, list.Runs)
	assert.Zero(t, list.StoredBytes)
}

// get sends a GET with the rig's key.
func (r *rig) get(path string) response {
	r.t.Helper()
	req, err := http.NewRequest(http.MethodGet, r.srv.URL+path, nil)
	require.NoError(r.t, err)
	req.Header.Set("Authorization", "Bearer "+r.key)
	resp, err := http.DefaultClient.Do(req)
	require.NoError(r.t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return response{status: resp.StatusCode, header: resp.Header, body: b, readErr: err}
}
