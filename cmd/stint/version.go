package main

import (
	"fmt"
	"runtime"
	"runtime/debug"
	"strings"

	"github.com/spf13/cobra"
)

// buildRevision and buildVersion may be set at link time (make build
// does: -ldflags "-X main.buildRevision=$(git rev-parse HEAD)"), for
// builds without Go's VCS stamping (-buildvcs=false, or a copy of the tree
// without .git). They are never written at run time.
var (
	buildRevision string
	buildVersion  string
)

// buildFacts is what a binary knows of its build.
type buildFacts struct {
	Version  string // the module version, "(devel)" for a build from a checkout
	Revision string // the VCS revision, "" when unknown
	Modified bool   // the tree had uncommitted changes
	Go       string
}

// readBuild reads the binary's build facts from Go's build information
// (info, when ok), falling back to what the linker set (linkedRevision,
// linkedVersion).
func readBuild(info *debug.BuildInfo, ok bool, linkedRevision, linkedVersion string) buildFacts {
	f := buildFacts{Version: "(devel)", Go: runtime.Version()}
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
		f.Revision = linkedRevision
	}
	if linkedVersion != "" && f.Version == "(devel)" {
		f.Version = linkedVersion
	}
	return f
}

// String is the text of stint version and stint --version.
func (f buildFacts) String() string {
	var b strings.Builder
	fmt.Fprintf(&b, "stint %s\n", f.Version)
	switch {
	case f.Revision == "":
		b.WriteString("revision unknown (built without VCS stamping: build with make build, or go build -buildvcs=true in a git checkout)\n")
	case f.Modified:
		fmt.Fprintf(&b, "revision %s (with uncommitted changes)\n", f.Revision)
	default:
		fmt.Fprintf(&b, "revision %s\n", f.Revision)
	}
	fmt.Fprintf(&b, "built with %s\n", f.Go)
	return b.String()
}

// currentBuild is this binary's build facts.
func currentBuild() buildFacts {
	info, ok := debug.ReadBuildInfo()
	return readBuild(info, ok, buildRevision, buildVersion)
}

func newVersionCmd() *cobra.Command {
	return &cobra.Command{
		Use:   "version",
		Short: "Print stint's version, VCS revision and Go release",
		Long: `Print the module version ("(devel)" for a build from a checkout), the VCS
revision it was built from (from Go's build stamping, else what make build
linked in; "unknown" when neither) and the Go release. stint --version
prints the same.`,
		Example: `  stint version
  stint --version`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			_, err := fmt.Fprint(cmd.OutOrStdout(), currentBuild())
			return err
		},
	}
}
