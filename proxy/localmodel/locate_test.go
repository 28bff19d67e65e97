package localmodel

import (
	"bytes"
	"context"
	"errors"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"testing"
)

// TestFetch runs the download path against a loopback server holding the
// real file. The public source itself (ModelURL) cannot be reached here: the
// test machines have no internet.
func TestFetch(t *testing.T) {
	data, err := os.ReadFile(modelPath(t))
	if err != nil {
		t.Fatal(err)
	}
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
	if err := Fetch(context.Background(), srv.Client(), srv.URL+"/stories260K.gguf", dst, ModelSHA256); err != nil {
		t.Fatal(err)
	}
	got, err := os.ReadFile(dst)
	if err != nil || !bytes.Equal(got, data) {
		t.Fatalf("downloaded file differs (%v)", err)
	}
	if _, err := Load(dst); err != nil {
		t.Fatal(err)
	}
	bad := filepath.Join(dir, "bad.gguf")
	if err := Fetch(context.Background(), srv.Client(), srv.URL+"/stories260K.gguf", bad, "00"); !errors.Is(err, ErrChecksum) {
		t.Errorf("wrong checksum: got %v, want ErrChecksum", err)
	}
	if _, err := os.Stat(bad); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("file kept after a checksum mismatch: %v", err)
	}
	if err := Fetch(context.Background(), srv.Client(), srv.URL+"/missing", bad, ModelSHA256); err == nil {
		t.Error("404 gave no error")
	}
	entries, _ := os.ReadDir(filepath.Join(dir, "models"))
	if len(entries) != 1 {
		t.Errorf("temporary files left: %v", entries)
	}
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
		if got != tc.want || !errors.Is(err, tc.err) {
			t.Errorf("%s: got %q, %v; want %q, %v", tc.name, got, err, tc.want, tc.err)
		}
	}
}
