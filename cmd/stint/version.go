package main

import (
	"fmt"
	"runtime/debug"
	"strings"

	"github.com/spf13/cobra"

	"github.com/stintlab/stint/internal/buildinfo"
)

// buildFacts is what a binary knows of its build.
type buildFacts struct{ buildinfo.Facts }

// readBuild reads the binary's build facts from Go's build information
// (info, when ok), falling back to what the linker set.
func readBuild(info *debug.BuildInfo, ok bool, linkedRevision, linkedVersion string) buildFacts {
	return buildFacts{buildinfo.Read(info, ok, linkedRevision, linkedVersion)}
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
func currentBuild() buildFacts { return buildFacts{buildinfo.Current()} }

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
