package main

import (
	"bytes"
	"encoding/json"
	"errors"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// runStintToExit runs `stint args...` in a child process to its end and
// returns its stdout, stderr and exit code.
func runStintToExit(t *testing.T, env []string, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	argv, _ := json.Marshal(args)
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(append(os.Environ(), "STINT_TEST_MAIN="+string(argv)), env...)
	var out, errOut bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errOut
	err := cmd.Run()
	var exit *exec.ExitError
	switch {
	case errors.As(err, &exit):
		code = exit.ExitCode()
	default:
		require.NoError(t, err, "run stint")
	}
	return out.String(), errOut.String(), code
}

// TestCheckConfigExitsWithoutOpeningAnything runs `stint serve
// --check-config` as a process: a good config prints "config ok: <summary>"
// and exits 0 without creating the data dir, dialing Redis or listening (its
// listen address is held by the test and its Redis port is closed); a bad
// one exits non-zero naming the field and line. Secrets the config names
// are reported as set or not set, never printed.
func TestCheckConfigExitsWithoutOpeningAnything(t *testing.T) {
	held, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	defer held.Close()
	closed, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	redisAddr := closed.Addr().String()
	closed.Close()

	dir := t.TempDir()
	data := filepath.Join(dir, "never-created")
	good := `listen: ` + held.Addr().String() + `
data: ` + data + `
upstreams:
  - {name: main, url: "https://api.example.com/v1", key_env: STINT_TEST_UPSTREAM_KEY}
teams:
  - {name: lab, keys: ["sha256:0000000000000000000000000000000000000000000000000000000000000001"]}
prices:
  quill-small: {input: 0.50, output: 1.50}
store:
  redis: {addrs: ["` + redisAddr + `"], password_env: STINT_TEST_REDIS_PASSWORD}
`
	const secret = "upstream-secret-value-never-printed"
	tests := []struct {
		name      string
		config    string
		env       []string
		wantCode0 bool
		want      []string // substrings of stdout (ok) or stderr (error)
	}{
		{"good, secrets set", good, []string{"STINT_TEST_UPSTREAM_KEY=" + secret, "STINT_TEST_REDIS_PASSWORD=" + secret}, true,
			[]string{"config ok: listen " + held.Addr().String(), "upstreams main", "1 teams", "spend control on (1 prices)", "redis standalone (" + redisAddr + ")", "STINT_TEST_UPSTREAM_KEY set", "STINT_TEST_REDIS_PASSWORD set"}},
		{"good, secrets absent", good, []string{"STINT_TEST_UPSTREAM_KEY=", "STINT_TEST_REDIS_PASSWORD="}, true,
			[]string{"config ok: ", "STINT_TEST_UPSTREAM_KEY not set", "STINT_TEST_REDIS_PASSWORD not set"}},
		{"typo'd key", strings.Replace(good, "teams:", "tems:", 1), nil, false,
			[]string{"line 5", `tems: unknown key; did you mean "teams"?`}},
		{"bad value", good + "log: {format: xml}\n", nil, false,
			[]string{"config line 11: log.format", `"xml"`}},
		{"redis address without port", strings.Replace(good, redisAddr, "redis.internal", 1), nil, false,
			[]string{"config line 10: store.redis.addrs[0]", "host:port"}},
		{"open mode off loopback", "listen: 0.0.0.0:8787\nupstreams: [{url: \"https://api.example.com/v1\"}]\n", nil, false,
			[]string{"refusing to listen on 0.0.0.0:8787"}},
	}
	for i, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(dir, "case"+string(rune('a'+i))+".yaml")
			require.NoError(t, os.WriteFile(path, []byte(tc.config), 0o600))
			stdout, stderr, code := runStintToExit(t, tc.env, "serve", "--config", path, "--check-config")
			got := stderr
			if tc.wantCode0 {
				got = stdout
				require.Equal(t, 0, code, "exit %d, want 0; stderr:\n%s", code, stderr)
			} else {
				require.NotEqualf(t, 0, code, "exit 0 for a bad config; stdout:\n%s", stdout)
			}
			for _, w := range tc.want {
				assert.Contains(t, got, w, "output %q does not contain %q", got, w)
			}
			assert.Falsef(t, strings.Contains(stdout+stderr, secret), "a secret's value was printed:\n%s%s", stdout, stderr)
			_, err := os.Stat(data)
			assert.ErrorIs(t, err, os.ErrNotExist, "--check-config touched the data dir: %v", err)
		})
	}
}
