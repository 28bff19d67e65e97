package deploy

import (
	"regexp"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestDockerfile checks the image recipe: a Go builder at go.mod's Go
// version, a static (CGO off) build of ./cmd/stint and the probe, and a
// final distroless stage that runs no shell, as a numeric non-root user.
func TestDockerfile(t *testing.T) {
	ins, err := parseDockerfile(readFile(t, "Dockerfile"))
	require.NoError(t, err)
	goVersion := regexp.MustCompile(`(?m)^go (\S+)$`).FindSubmatch(readFile(t, "../go.mod"))
	require.False(t, goVersion == nil, "no go line in go.mod")
	var froms, args, build, final []instruction
	for _, in := range ins {
		switch {
		case in.Cmd == "FROM":
			froms = append(froms, in)
		case in.Cmd == "ARG" && in.Stage < 0:
			args = append(args, in)
		}
		if in.Stage == 0 {
			build = append(build, in)
		}
	}
	require.Len(t, froms, 2, "%d stages, want a builder and a final image", len(froms))
	for _, in := range ins {
		if in.Stage == 1 {
			final = append(final, in)
		}
	}
	assert.Truef(t, slices.ContainsFunc(args, func(a instruction) bool { return a.Args == "GO_VERSION="+string(goVersion[1]) }), "ARG GO_VERSION is not go.mod's %s", goVersion[1])
	assert.Falsef(t, !strings.HasPrefix(froms[0].Args, "golang:${GO_VERSION}") || !strings.HasSuffix(froms[0].Args, " AS build"), "builder stage %q, want golang:${GO_VERSION}… AS build", froms[0].Args)
	base := froms[1].Args
	assert.Falsef(t, !strings.HasPrefix(base, "gcr.io/distroless/static") && base != "scratch", "final base %q, want distroless static or scratch", base)
	assert.True(t, slices.ContainsFunc(build, func(in instruction) bool { return in.Cmd == "ENV" && in.Args == "CGO_ENABLED=0" }), "the builder does not set CGO_ENABLED=0")
	runs := strings.Join(instructionArgs(build, "RUN"), "\n")
	for _, want := range []string{"go build -trimpath -ldflags=\"-s -w\" -o /out/usr/local/bin/stint ./cmd/stint", "-o /out/usr/local/bin/stint-probe ./deploy/probe"} {
		assert.Contains(t, runs, want, "the builder does not run %q", want)
	}
	for _, in := range final {
		switch in.Cmd {
		case "RUN", "ADD", "ARG", "ENV":
			assert.Failf(t, "final stage has "+in.Cmd, "final stage has %s %s: it has no shell, and build settings or secrets do not belong in it", in.Cmd, in.Args)
		case "COPY":
			assert.Contains(t, in.Args, "--from=build", "final stage copies %q from the build context; only built files go in", in.Args)
		}
	}
	user := instructionArgs(final, "USER")
	assert.Falsef(t, len(user) != 1 || !regexp.MustCompile(`^[1-9][0-9]*:[1-9][0-9]*$`).MatchString(user[0]), "USER %v, want one numeric non-root uid:gid (Kubernetes runAsNonRoot checks the number)", user)
	entry := instructionArgs(final, "ENTRYPOINT")
	assert.Falsef(t, len(entry) != 1 || !slices.Equal(execForm(t, entry[0]), []string{"/usr/local/bin/stint"}), "ENTRYPOINT %v, want [/usr/local/bin/stint]", entry)
	hc := instructionArgs(final, "HEALTHCHECK")
	assert.Falsef(t, len(hc) != 1 || !strings.Contains(hc[0], `CMD ["/usr/local/bin/stint-probe", "http://127.0.0.1:`), "HEALTHCHECK %v, want the exec form of /usr/local/bin/stint-probe", hc)

	ignore := strings.Fields(string(readFile(t, "../.dockerignore")))
	for _, want := range []string{".git", "**/*.gguf", "/deploy/stint.env", "/stint-data"} {
		assert.Truef(t, slices.Contains(ignore, want), ".dockerignore does not exclude %s", want)
	}
}
