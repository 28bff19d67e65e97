package localmodel

import (
	"bytes"
	"context"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestFetch runs the download path against a loopback server holding the
// real file. The public source itself (ModelURL) cannot be reached here: the
// test machines have no internet.
func TestFetch(t *testing.T) {
	data, err := os.ReadFile(modelPath(t))
	require.NoError(t, err)
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path != "/stories260K.gguf" {
			http.NotFound(w, r)
			return
		}
		_, _ = w.Write(data)
	}))
	defer srv.Close()
	dir := t.TempDir()
	dst := filepath.Join(dir, "models", ModelFileName)
	// The SHA-256 recorded in MODEL-SOURCE.md.
	require.NoError(t, Fetch(context.Background(), srv.Client(), srv.URL+"/stories260K.gguf", dst, ModelSHA256))
	got, err := os.ReadFile(dst)
	require.NoError(t, err, "downloaded file differs (%v)", err)
	require.True(t, bytes.Equal(got, data), "downloaded file differs (%v)", err)
	_, err = Load(dst)
	require.NoError(t, err)
	bad := filepath.Join(dir, "bad.gguf")
	err = Fetch(context.Background(), srv.Client(), srv.URL+"/stories260K.gguf", bad, "00")
	assert.ErrorIs(t, err, ErrChecksum, "wrong checksum: got %v, want ErrChecksum", err)
	_, err = os.Stat(bad)
	assert.ErrorIs(t, err, os.ErrNotExist, "file kept after a checksum mismatch: %v", err)
	err = Fetch(context.Background(), srv.Client(), srv.URL+"/missing", bad, ModelSHA256)
	assert.Error(t, err, "404 gave no error")
	entries, _ := os.ReadDir(filepath.Join(dir, "models"))
	assert.Len(t, entries, 1, "temporary files left: %v", entries)
}

func TestLocate(t *testing.T) {
	real := modelPath(t)
	env := func(v string) func(string) string {
		return func(k string) string {
			if k == ModelEnv {
				return v
			}
			return ""
		}
	}
	missing := filepath.Join(t.TempDir(), "none.gguf")
	tests := []struct {
		name, flag, env, want string
		err                   error
	}{
		{"flag wins", real, missing, real, nil},
		{"env", "", real, real, nil},
		{"flag missing", missing, "", "", ErrModelNotFound},
		{"env missing", "", missing, "", ErrModelNotFound},
	}
	for _, tc := range tests {
		got, err := Locate(tc.flag, env(tc.env))
		assert.Equal(t, tc.want, got, "%s: got %q, %v; want %q, %v", tc.name, got, err, tc.want, tc.err)
		assert.ErrorIs(t, err, tc.err, "%s: got %q, %v; want %q, %v", tc.name, got, err, tc.want, tc.err)
	}
}
