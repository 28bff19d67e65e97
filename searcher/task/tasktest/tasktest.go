// Package tasktest writes the example task file (task.ExampleFile) with a
// test's edits into a temporary directory, beside copies of the demo
// datasets from testdata/search that it names, for tests of the search, the
// sidecar and the command.
package tasktest

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stintlab/stint/searcher/task"
)

// datasets are the example task's data files in testdata/search.
var datasets = [...]string{"reading-corner-train.jsonl", "reading-corner-dev.jsonl", "reading-corner-test.jsonl"}

// WriteExample writes the example task with edits applied (old, new pairs,
// each old text replaced once; one the example lacks fails tb) next to
// copies of its datasets, and returns the task file's path.
func WriteExample(tb testing.TB, edits ...string) string {
	tb.Helper()
	if len(edits)%2 != 0 {
		tb.Fatalf("tasktest: edits come in old, new pairs; got %d strings", len(edits))
	}
	src := testdataDir(tb)
	dir := tb.TempDir()
	for _, name := range datasets {
		b, err := os.ReadFile(filepath.Join(src, name))
		if err != nil {
			tb.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dir, name), b, 0o600); err != nil {
			tb.Fatal(err)
		}
	}
	text := task.ExampleFile
	for i := 0; i < len(edits); i += 2 {
		if !strings.Contains(text, edits[i]) {
			tb.Fatalf("tasktest: the example task has no %q", edits[i])
		}
		text = strings.Replace(text, edits[i], edits[i+1], 1)
	}
	path := filepath.Join(dir, "task.yaml")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		tb.Fatal(err)
	}
	return path
}

// testdataDir is testdata/search beside the go.mod above the test's
// working directory (a package's directory under go test).
func testdataDir(tb testing.TB) string {
	tb.Helper()
	wd, err := os.Getwd()
	if err != nil {
		tb.Fatal(err)
	}
	for dir := wd; ; dir = filepath.Dir(dir) {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			return filepath.Join(dir, "testdata", "search")
		}
		if filepath.Dir(dir) == dir {
			tb.Fatalf("tasktest: no go.mod above %s", wd)
		}
	}
}
