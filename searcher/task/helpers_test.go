package task

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
)

// localTokenizer loads the real stories260K model's tokenizer.
func localTokenizer(tb testing.TB) LocalTokenizer {
	tb.Helper()
	m, err := localmodel.Load(modeltest.Path(tb))
	require.NoError(tb, err)
	return NewLocalTokenizer(m.Tokenizer())
}

// writeFiles writes name → content into a fresh directory and returns it.
func writeFiles(tb testing.TB, files map[string]string) string {
	tb.Helper()
	dir := tb.TempDir()
	for name, content := range files {
		require.NoError(tb, os.WriteFile(filepath.Join(dir, name), []byte(content), 0o644))
	}
	return dir
}

// searchTestdata is the repository's testdata/search folder.
const searchTestdata = "../../testdata/search"
