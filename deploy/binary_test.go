package deploy

import (
	"bufio"
	"bytes"
	"debug/elf"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/modeltest"
)

// buildBinaries builds stint and stint-probe the way the Dockerfile does
// (CGO off, trimmed paths) into a temporary directory.
func buildBinaries(t *testing.T) (stint, probe string) {
	t.Helper()
	goTool, err := exec.LookPath("go")
	require.NoError(t, err, "the go tool is needed to build the binaries under test")
	dir := t.TempDir()
	stint, probe = filepath.Join(dir, "stint"), filepath.Join(dir, "stint-probe")
	for _, b := range []struct{ out, pkg string }{{stint, "./cmd/stint"}, {probe, "./deploy/probe"}} {
		cmd := exec.Command(goTool, "build", "-trimpath", "-o", b.out, b.pkg)
		cmd.Dir = ".."
		cmd.Env = append(os.Environ(), "CGO_ENABLED=0")
		out, err := cmd.CombinedOutput()
		require.NoError(t, err, "go build %s: %v\n%s", b.pkg, err, out)
	}
	return stint, probe
}

// cleanEnv is the test's environment without stint's variables, so a
// config check sees none of the secrets.
func cleanEnv() []string {
	var env []string
	for _, e := range os.Environ() {
		if !strings.HasPrefix(e, "STINT_") {
			env = append(env, e)
		}
	}
	return env
}

// run runs a binary to its end and returns stdout, stderr and exit code.
func run(t *testing.T, bin string, args ...string) (string, string, int) {
	t.Helper()
	cmd := exec.Command(bin, args...)
	cmd.Env = cleanEnv()
	var out, errOut bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errOut
	err := cmd.Run()
	var exit *exec.ExitError
	require.Falsef(t, err != nil && !errors.As(err, &exit), "run %s: %v", bin, err)
	return out.String(), errOut.String(), cmd.ProcessState.ExitCode()
}

// TestEveryMountedConfigPassesCheckConfig builds the static binary the
// image ships and runs `stint serve --check-config` on every config a
// deployment mounts; broken copies of one fail, naming field and line.
func TestEveryMountedConfigPassesCheckConfig(t *testing.T) {
	stint, _ := buildBinaries(t)
	f, err := elf.Open(stint)
	require.NoError(t, err)
	libs, _ := f.ImportedLibraries()
	for _, p := range f.Progs {
		assert.False(t, p.Type == elf.PT_INTERP, "stint is dynamically linked (has an interpreter); the distroless static image needs CGO_ENABLED=0")
	}
	assert.Emptyf(t, libs, "stint links shared libraries %v", libs)
	f.Close()

	dir := t.TempDir()
	k8s := filepath.Join(dir, "k8s-stint.yaml")
	k8sSrc := string(k8sProxyConfig(t, loadManifests(t)))
	require.NoError(t, os.WriteFile(k8s, []byte(k8sSrc), 0o600))
	for _, path := range []string{"config/proxy.yaml", "config/host.yaml", k8s} {
		t.Run(filepath.Base(path), func(t *testing.T) {
			stdout, stderr, code := run(t, stint, "serve", "--config", path, "--check-config")
			require.Equal(t, 0, code, "exit %d:\n%s", code, stderr)
			assert.Truef(t, strings.HasPrefix(stdout, "config ok: listen 0.0.0.0:8787, data /var/lib/stint,"), "summary %q", stdout)
			t.Log(strings.TrimSpace(stdout))
		})
	}

	tests := []struct {
		name, old, new string
		want           []string
	}{
		{"typo'd key", "  max_body_bytes: 4MiB", "  max_body_byte: 4MiB", []string{"line ", "max_body_byte"}},
		{"bad log format", "format: json", "format: yaml", []string{"line ", "log.format", `"yaml"`}},
		{"seed without port", "redis-cluster-1.redis-cluster.redis.svc.cluster.local:6379", "redis-cluster-1", []string{"line ", "store.redis.addrs[1]"}},
		{"key in the clear", `"sha256:0000000000000000000000000000000000000000000000000000000000000001"`, `"stint-not-a-hash"`, []string{"line ", "teams[0].keys[0]", "never in the clear"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			require.Contains(t, k8sSrc, tc.old, "the config has no %q", tc.old)
			bad := filepath.Join(t.TempDir(), "bad.yaml")
			require.NoError(t, os.WriteFile(bad, []byte(strings.Replace(k8sSrc, tc.old, tc.new, 1)), 0o600))
			stdout, stderr, code := run(t, stint, "serve", "--config", bad, "--check-config")
			require.Falsef(t, code == 0, "exit 0 for a broken config:\n%s", stdout)
			for _, w := range tc.want {
				assert.Contains(t, stderr, w, "error %q does not contain %q", stderr, w)
			}
		})
	}
}

// started is a stint process a test runs until it ends.
type started struct {
	cmd    *exec.Cmd
	addr   string
	exited chan struct{}
}

// start runs bin with args and waits for the line announcing its address.
func start(t *testing.T, addrRE *regexp.Regexp, bin string, args ...string) *started {
	t.Helper()
	cmd := exec.Command(bin, args...)
	cmd.Env = cleanEnv()
	stderr, err := cmd.StderrPipe()
	require.NoError(t, err)
	require.NoError(t, cmd.Start())
	s := &started{cmd: cmd, exited: make(chan struct{})}
	addrc := make(chan string, 1)
	var logs strings.Builder
	go func() {
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			logs.WriteString(sc.Text() + "\n")
			if m := addrRE.FindStringSubmatch(sc.Text()); m != nil {
				select {
				case addrc <- m[1]:
				default:
				}
			}
		}
		_ = cmd.Wait()
		close(s.exited)
	}()
	t.Cleanup(func() {
		_ = cmd.Process.Kill()
		<-s.exited
	})
	select {
	case s.addr = <-addrc:
	case <-s.exited:
		require.FailNowf(t, "exited before listening", "%s %v exited before listening:\n%s", bin, args, logs.String())
	case <-time.After(60 * time.Second):
		require.FailNowf(t, "no address", "%s %v did not announce its address", bin, args)
	}
	return s
}

// TestHealthChecksAnswerOnTheRealProcesses runs each role the way the
// deployments do and asks stint-probe the paths their health checks ask:
// 2xx while serving, non-zero for a missing path and after shutdown.
func TestHealthChecksAnswerOnTheRealProcesses(t *testing.T) {
	stint, probe := buildBinaries(t)
	model := modeltest.Path(t)
	c := loadCompose(t)
	m := loadManifests(t)
	serveRE := regexp.MustCompile(`listening.*addr=([0-9.:]+)`)

	proxy := start(t, serveRE, stint, "serve", "--listen", "127.0.0.1:0", "--upstream", "http://127.0.0.1:9/v1", "--data", t.TempDir())
	local := start(t, regexp.MustCompile(`serving .* on http://([0-9.:]+)`), stint, "local", "--model", model, "--listen", "127.0.0.1:0")
	search := start(t, serveRE, stint, "search", "serve", "--listen", "127.0.0.1:0", "--data", t.TempDir(), "--model", model, "--proxy", "http://"+proxy.addr+"/v1")

	pc := m.deployments["stint-proxy"].Spec.Template.Spec.Containers[0]
	sc := m.deployments["stint-search"].Spec.Template.Spec.Containers[0]
	checks := []struct {
		from string
		addr string
		path string
	}{
		{"compose proxy-a", proxy.addr, healthURL(t, "proxy-a", c.Services["proxy-a"]).Path},
		{"Dockerfile HEALTHCHECK", proxy.addr, "/healthz"},
		{"k8s proxy readiness", proxy.addr, pc.ReadinessProbe.HTTPGet.Path},
		{"k8s proxy liveness", proxy.addr, pc.LivenessProbe.HTTPGet.Path},
		{"compose local", local.addr, healthURL(t, "local", c.Services["local"]).Path},
		{"compose search", search.addr, healthURL(t, "search", c.Services["search"]).Path},
		{"k8s search liveness", search.addr, sc.LivenessProbe.HTTPGet.Path},
	}
	for _, ch := range checks {
		_, stderr, code := run(t, probe, "http://"+ch.addr+ch.path)
		assert.Equal(t, 0, code, "%s: stint-probe %s exit %d: %s", ch.from, ch.path, code, stderr)
	}
	_, _, code := run(t, probe, "http://"+proxy.addr+"/no-such-path")
	assert.Equal(t, 1, code, "stint-probe on a missing path: exit %d, want 1", code)
	_, _, code = run(t, probe)
	assert.Equal(t, 2, code, "stint-probe without a URL: exit %d, want 2", code)
	require.NoError(t, proxy.cmd.Process.Signal(syscall.SIGTERM))
	<-proxy.exited
	code = proxy.cmd.ProcessState.ExitCode()
	assert.Equal(t, 0, code, "stint serve exited %d after SIGTERM, want a clean drain", code)
	_, _, code = run(t, probe, "http://"+proxy.addr+"/healthz")
	assert.Equal(t, 1, code, "stint-probe after shutdown: exit %d, want 1", code)
}
