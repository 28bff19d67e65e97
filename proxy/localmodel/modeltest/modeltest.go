// Package modeltest finds the real model file for tests: env STINT_MODEL,
// else ../shared/models/stories260K.gguf beside the directory holding
// go.mod. It fails (never skips) when the file is missing, saying where it
// looked, so CI notices breakage.
package modeltest

import (
	"os"
	"path/filepath"
	"testing"
)

// Path returns the model file's path or fails tb.
func Path(tb testing.TB) string {
	tb.Helper()
	if p := os.Getenv("STINT_MODEL"); p != "" {
		if _, err := os.Stat(p); err != nil {
			tb.Fatalf("model file not found at STINT_MODEL=%q: %v", p, err)
		}
		return p
	}
	wd, err := os.Getwd()
	if err != nil {
		tb.Fatal(err)
	}
	for dir := wd; ; dir = filepath.Dir(dir) {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			p := filepath.Join(dir, "..", "shared", "models", "stories260K.gguf")
			if _, err := os.Stat(p); err != nil {
				tb.Fatalf("model file not found: STINT_MODEL is unset and %s: %v", p, err)
			}
			return p
		}
		if filepath.Dir(dir) == dir {
			tb.Fatalf("model file not found: STINT_MODEL is unset and no go.mod above %s", wd)
		}
	}
}
