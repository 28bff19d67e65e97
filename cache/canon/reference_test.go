package canon

import (
	"encoding/hex"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// referenceModule ships the reference implementation's RFC 8785 test data:
// testdata/input/NAME.json canonicalizes to testdata/output/NAME.json,
// whose bytes testdata/outhex/NAME.txt gives in hex.
const referenceModule = "github.com/gowebpki/jcs"

// referenceTestdata is the testdata directory of referenceModule in the
// module cache (a test-only dependency of this module).
func referenceTestdata(t *testing.T) string {
	t.Helper()
	out, err := exec.Command("go", "list", "-m", "-f", "{{.Dir}}", referenceModule).Output()
	require.NoError(t, err, "go list -m %s", referenceModule)
	dir := strings.TrimSpace(string(out))
	require.NotEmpty(t, dir, "%s is not in the module cache: run go mod download", referenceModule)
	return filepath.Join(dir, "testdata")
}

// TestReferenceTestdata checks every input/output pair of the reference
// test data, and every hex form of an output.
func TestReferenceTestdata(t *testing.T) {
	dir := referenceTestdata(t)
	inputs, err := filepath.Glob(filepath.Join(dir, "input", "*.json"))
	require.NoError(t, err)
	require.GreaterOrEqual(t, len(inputs), 10, "too few reference inputs in %s", dir)
	for _, name := range []string{"values", "weird"} { // RFC 8785's §3.2 sample; the sorting cases
		require.FileExists(t, filepath.Join(dir, "input", name+".json"))
	}
	hexes := 0
	for _, in := range inputs {
		name := strings.TrimSuffix(filepath.Base(in), ".json")
		t.Run(name, func(t *testing.T) {
			raw, err := os.ReadFile(in)
			require.NoError(t, err)
			want, err := os.ReadFile(filepath.Join(dir, "output", name+".json"))
			require.NoError(t, err, "every reference input has an output")
			got, err := Transform(raw)
			require.NoError(t, err, "Transform(%s)", raw)
			assert.Equal(t, string(want), string(got), "Transform(testdata/input/%s.json)", name)
			outhex, err := os.ReadFile(filepath.Join(dir, "outhex", name+".txt"))
			if os.IsNotExist(err) {
				return // not every output has a hex form
			}
			require.NoError(t, err)
			wantBytes, err := hex.DecodeString(strings.Join(strings.Fields(string(outhex)), ""))
			require.NoError(t, err, "outhex/%s.txt", name)
			assert.Equal(t, wantBytes, got, "UTF-8 bytes of Transform(testdata/input/%s.json)", name)
			hexes++
		})
	}
	assert.GreaterOrEqual(t, hexes, 9, "hex forms checked")
}
