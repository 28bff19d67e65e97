// Package buildinfo says which build of stint is running: the module
// version, the VCS revision and the Go release, from Go's build stamping
// or, when that is off, from what the linker was given.
package buildinfo

import (
	"runtime"
	"runtime/debug"
)

// linkedRevision and linkedVersion may be set at link time
// (-ldflags "-X github.com/stintlab/stint/internal/buildinfo.linkedRevision=$(git rev-parse HEAD)",
// as make build does) for builds without Go's VCS stamping (-buildvcs=false,
// or a copy of the tree without .git). Nothing writes them at run time.
var (
	linkedRevision string
	linkedVersion  string
)

// Devel is the module version Go gives a build from a checkout.
const Devel = "(devel)"

// Facts is what a binary knows of its build.
type Facts struct {
	Version  string // the module version, Devel for a build from a checkout
	Revision string // the VCS revision, "" when unknown
	Modified bool   // the tree had uncommitted changes
	Go       string // the Go release that built it
}

// Read reads build facts from Go's build information (info, when ok),
// falling back to a linked revision and version where it has none.
func Read(info *debug.BuildInfo, ok bool, revision, version string) Facts {
	f := Facts{Version: Devel, Go: runtime.Version()}
	if ok {
		if info.Main.Version != "" {
			f.Version = info.Main.Version
		}
		for _, s := range info.Settings {
			switch s.Key {
			case "vcs.revision":
				f.Revision = s.Value
			case "vcs.modified":
				f.Modified = s.Value == "true"
			}
		}
	}
	if f.Revision == "" {
		f.Revision = revision
	}
	if version != "" && f.Version == Devel {
		f.Version = version
	}
	return f
}

// Current is this binary's build facts.
func Current() Facts {
	info, ok := debug.ReadBuildInfo()
	return Read(info, ok, linkedRevision, linkedVersion)
}

// Label names the build in one word for records such as a search's
// results: the module version when it is a release, else the VCS
// revision (with "+modified" for a tree with uncommitted changes), else
// "unknown".
func (f Facts) Label() string {
	switch {
	case f.Version != Devel && f.Version != "":
		return f.Version
	case f.Revision == "":
		return "unknown"
	case f.Modified:
		return f.Revision + "+modified"
	default:
		return f.Revision
	}
}
