package deploy

import (
	"regexp"
	"slices"
	"strings"
	"testing"
)

// TestDockerfile checks the image recipe: a Go builder at go.mod's Go
// version, a static (CGO off) build of ./cmd/stint and the probe, and a
// final distroless stage that runs no shell, as a numeric non-root user.
func TestDockerfile(t *testing.T) {
	ins, err := parseDockerfile(readFile(t, "Dockerfile"))
	if err != nil {
		t.Fatal(err)
	}
	goVersion := regexp.MustCompile(`(?m)^go (\S+)$`).FindSubmatch(readFile(t, "../go.mod"))
	if goVersion == nil {
		t.Fatal("no go line in go.mod")
	}
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
	if len(froms) != 2 {
		t.Fatalf("%d stages, want a builder and a final image", len(froms))
	}
	for _, in := range ins {
		if in.Stage == 1 {
			final = append(final, in)
		}
	}
	if !slices.ContainsFunc(args, func(a instruction) bool { return a.Args == "GO_VERSION="+string(goVersion[1]) }) {
		t.Errorf("ARG GO_VERSION is not go.mod's %s", goVersion[1])
	}
	if !strings.HasPrefix(froms[0].Args, "golang:${GO_VERSION}") || !strings.HasSuffix(froms[0].Args, " AS build") {
		t.Errorf("builder stage %q, want golang:${GO_VERSION}… AS build", froms[0].Args)
	}
	if base := froms[1].Args; !strings.HasPrefix(base, "gcr.io/distroless/static") && base != "scratch" {
		t.Errorf("final base %q, want distroless static or scratch", base)
	}
	if !slices.ContainsFunc(build, func(in instruction) bool { return in.Cmd == "ENV" && in.Args == "CGO_ENABLED=0" }) {
		t.Error("the builder does not set CGO_ENABLED=0")
	}
	runs := strings.Join(instructionArgs(build, "RUN"), "\n")
	for _, want := range []string{"go build -trimpath -ldflags=\"-s -w\" -o /out/usr/local/bin/stint ./cmd/stint", "-o /out/usr/local/bin/stint-probe ./deploy/probe"} {
		if !strings.Contains(runs, want) {
			t.Errorf("the builder does not run %q", want)
		}
	}
	for _, in := range final {
		switch in.Cmd {
		case "RUN", "ADD", "ARG", "ENV":
			t.Errorf("final stage has %s %s: it has no shell, and build settings or secrets do not belong in it", in.Cmd, in.Args)
		case "COPY":
			if !strings.Contains(in.Args, "--from=build") {
				t.Errorf("final stage copies %q from the build context; only built files go in", in.Args)
			}
		}
	}
	user := instructionArgs(final, "USER")
	if len(user) != 1 || !regexp.MustCompile(`^[1-9][0-9]*:[1-9][0-9]*$`).MatchString(user[0]) {
		t.Errorf("USER %v, want one numeric non-root uid:gid (Kubernetes runAsNonRoot checks the number)", user)
	}
	entry := instructionArgs(final, "ENTRYPOINT")
	if len(entry) != 1 || !slices.Equal(execForm(t, entry[0]), []string{"/usr/local/bin/stint"}) {
		t.Errorf("ENTRYPOINT %v, want [/usr/local/bin/stint]", entry)
	}
	hc := instructionArgs(final, "HEALTHCHECK")
	if len(hc) != 1 || !strings.Contains(hc[0], `CMD ["/usr/local/bin/stint-probe", "http://127.0.0.1:`) {
		t.Errorf("HEALTHCHECK %v, want the exec form of /usr/local/bin/stint-probe", hc)
	}

	ignore := strings.Fields(string(readFile(t, "../.dockerignore")))
	for _, want := range []string{".git", "**/*.gguf", "/deploy/stint.env", "/stint-data"} {
		if !slices.Contains(ignore, want) {
			t.Errorf(".dockerignore does not exclude %s", want)
		}
	}
}
