package localmodel

import (
	"os/exec"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestImportsOnlyLeaves holds the layout rule that the model runner is a
// leaf: of stint it imports (directly or not) only its own subpackages and
// the wire-format leaves proxy/wire and proxy/sse, which import nothing of
// stint, so the searcher may use it in-process.
func TestImportsOnlyLeaves(t *testing.T) {
	const module = "github.com/stintlab/stint/"
	allowed := map[string][]string{
		module + "proxy/localmodel": {module + "proxy/localmodel", module + "proxy/wire", module + "proxy/sse"},
		module + "proxy/wire":       {module + "proxy/wire"},
		module + "proxy/sse":        {module + "proxy/sse"},
	}
	for pkg, ok := range allowed {
		out, err := exec.Command("go", "list", "-deps", "-f", "{{.ImportPath}}", pkg).Output()
		require.NoError(t, err, "go list %s", pkg)
		for _, dep := range strings.Fields(string(out)) {
			if !strings.HasPrefix(dep, module) {
				continue
			}
			fits := false
			for _, a := range ok {
				fits = fits || dep == a || strings.HasPrefix(dep, a+"/")
			}
			assert.True(t, fits, "%s imports %s", pkg, dep)
		}
	}
}
