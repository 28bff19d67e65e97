package buildinfo

import (
	"runtime/debug"
	"testing"

	"github.com/stretchr/testify/assert"
)

func TestReadAndLabel(t *testing.T) {
	stamped := func(version string, settings ...debug.BuildSetting) *debug.BuildInfo {
		return &debug.BuildInfo{Main: debug.Module{Version: version}, Settings: settings}
	}
	rev := debug.BuildSetting{Key: "vcs.revision", Value: "abc123"}
	dirty := debug.BuildSetting{Key: "vcs.modified", Value: "true"}
	cases := []struct {
		name             string
		info             *debug.BuildInfo
		ok               bool
		linked, linkedV  string
		wantRev, wantLbl string
	}{
		{"release", stamped("v1.2.0"), true, "", "", "", "v1.2.0"},
		{"checkout with VCS stamping", stamped(Devel, rev), true, "", "", "abc123", "abc123"},
		{"checkout with changes", stamped(Devel, rev, dirty), true, "", "", "abc123", "abc123+modified"},
		{"stamping off, revision linked", stamped(Devel), true, "def456", "", "def456", "def456"},
		{"stamping wins over the linker", stamped(Devel, rev), true, "def456", "", "abc123", "abc123"},
		{"linked version", stamped(Devel), true, "", "v0.9.0", "", "v0.9.0"},
		{"no build information", nil, false, "", "", "", "unknown"},
		{"no build information, linked", nil, false, "def456", "", "def456", "def456"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			f := Read(c.info, c.ok, c.linked, c.linkedV)
			assert.Equal(t, c.wantRev, f.Revision, "revision")
			assert.Equal(t, c.wantLbl, f.Label(), "label")
			assert.NotEmpty(t, f.Go, "Go release")
		})
	}
}
