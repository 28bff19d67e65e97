package main

import (
	"encoding/json"
	"fmt"
	"log/slog"
	"net/http/httptest"
	"os"
	"path/filepath"
	"regexp"
	"runtime/debug"
	"strings"
	"testing"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// allCommands walks the command tree, root first.
func allCommands(c *cobra.Command) []*cobra.Command {
	out := []*cobra.Command{c}
	for _, s := range c.Commands() {
		out = append(out, allCommands(s)...)
	}
	return out
}

// cobraOwn reports whether c is one of the commands cobra adds itself
// (help, and completion with its shells).
func cobraOwn(c *cobra.Command) bool {
	for ; c != nil; c = c.Parent() {
		if c.Name() == "completion" || c.Name() == "help" {
			return true
		}
	}
	return false
}

// TestHelpIsCompleteAndUniform runs --help on every command: no output
// holds a backquote (pflag turns a backquoted word of a usage string into
// the flag's placeholder: `--config stint config example`), every command
// of stint's own has a description and examples, every flag that takes a
// value shows a placeholder word of its own, and defaults are shown one
// way, "(default: X)", rendered from the flag rather than written into its
// usage.
func TestHelpIsCompleteAndUniform(t *testing.T) {
	for _, c := range allCommands(newRootCmd()) {
		path := strings.Fields(c.CommandPath())[1:]
		t.Run(c.CommandPath(), func(t *testing.T) {
			out, err := runCLI(t, append(path, "--help")...)
			require.NoError(t, err)
			assert.NotContains(t, out, "`", "a backquote in the help")
			assert.NotContains(t, out, "(default ", "a default not in the one form (default: X)")
			if cobraOwn(c) {
				return
			}
			assert.NotEmpty(t, c.Long, "no description beyond the one-line summary")
			assert.NotEmpty(t, c.Example, "no examples")
			c.LocalFlags().VisitAll(func(f *pflag.Flag) {
				assert.NotContains(t, f.Usage, "(default", "--%s: its default is written into the usage, not rendered", f.Name)
				if f.Value.Type() != "bool" && f.Name != "help" {
					v := f.Annotations[annotPlaceholder]
					assert.True(t, len(v) == 1 && regexp.MustCompile(`^[A-Z][A-Z-]*$`).MatchString(v[0]), "--%s has no placeholder word of its own", f.Name)
					assert.Contains(t, out, "--"+f.Name+" "+flagPlaceholder(f))
				}
				if d := flagDefault(f); d != "" {
					assert.Contains(t, out, "(default: "+d+")", "--%s", f.Name)
				}
			})
		})
	}
}

// TestProxyFlagOneForm: --proxy takes the base URL with or without /v1
// (or behind a path prefix) everywhere, and a wrong form says exactly what
// to change.
func TestProxyFlagOneForm(t *testing.T) {
	cases := []struct {
		in, want, fault string
	}{
		{"http://127.0.0.1:8787", "http://127.0.0.1:8787", ""},
		{"http://127.0.0.1:8787/", "http://127.0.0.1:8787", ""},
		{"http://127.0.0.1:8787/v1", "http://127.0.0.1:8787", ""},
		{"http://127.0.0.1:8787/v1/", "http://127.0.0.1:8787", ""},
		{"https://gw.example/stint/v1", "https://gw.example/stint", ""},
		{"127.0.0.1:8787", "", "give the scheme too, like http://127.0.0.1:8787"},
		{"http://127.0.0.1:8787/v1/completions", "", "names an endpoint: give the proxy's base URL, http://127.0.0.1:8787"},
		{"http://127.0.0.1:8787/stint/runs", "", "names an endpoint: give the proxy's base URL, http://127.0.0.1:8787"},
		{"ftp://127.0.0.1:8787", "", "want the proxy's base URL, like http://127.0.0.1:8787"},
		{"http://127.0.0.1:8787/?team=lab", "", "give only scheme, host and port"},
	}
	for _, c := range cases {
		t.Run(c.in, func(t *testing.T) {
			got, err := proxyRoot(c.in)
			if c.fault != "" {
				require.Error(t, err)
				assert.Contains(t, err.Error(), c.fault)
				return
			}
			require.NoError(t, err)
			assert.Equal(t, c.want, got)
		})
	}
	// One default everywhere, and --key beside every --proxy.
	seen := 0
	for _, c := range allCommands(newRootCmd()) {
		lookup := func(name string) *pflag.Flag {
			if f := c.LocalFlags().Lookup(name); f != nil {
				return f
			}
			return c.InheritedFlags().Lookup(name)
		}
		f := lookup("proxy")
		if f == nil {
			continue
		}
		seen++
		assert.Equal(t, defaultProxy, f.DefValue, "%s --proxy", c.CommandPath())
		assert.NotNil(t, lookup("key"), "%s has --proxy but no --key", c.CommandPath())
	}
	// search run, serve, headroom and compare; runs and its 5
	// subcommands; budget and its 3; statement.
	assert.Equal(t, 15, seen, "commands with --proxy")
}

// openProxy runs a proxy without a config (open mode) in front of the
// in-test upstream, as stint serve --upstream URL does.
func openProxy(t *testing.T) string {
	t.Helper()
	up := upstreamtest.New(upstreamtest.Options{})
	t.Cleanup(up.Close)
	cfg, err := resolveConfig(serveFlags{upstream: up.URL(), data: t.TempDir(), listen: "127.0.0.1:0"})
	require.NoError(t, err)
	srv, err := buildServer(t.Context(), cfg, slog.New(slog.DiscardHandler), nil)
	require.NoError(t, err)
	t.Cleanup(func() { _ = srv.close() })
	ts := httptest.NewServer(srv.proxy)
	t.Cleanup(ts.Close)
	return ts.URL
}

// TestClientCommandsNeedNoKeyInOpenMode: against a proxy run without a
// config, the client commands work with no key at all (and --json prints
// what the table shows); against one with teams, a missing key is asked
// for by --key and STINT_KEY, and a --proxy that is not the proxy's base
// URL gets a hint, never a bare 404.
func TestClientCommandsNeedNoKeyInOpenMode(t *testing.T) {
	t.Setenv(teamKeyEnv, "")
	t.Setenv(adminKeyEnv, "")
	open := openProxy(t)
	out, err := runCLI(t, "runs", "list", "--proxy", open)
	require.NoError(t, err, out)
	assert.Contains(t, out, "no runs")
	out, err = runCLI(t, "runs", "list", "--proxy", open+"/v1", "--json")
	require.NoError(t, err, out)
	var l proxy.RunList
	require.NoError(t, json.Unmarshal([]byte(out), &l), out)
	assert.NotNil(t, l.Runs)
	// Without prices nothing is recorded, and the commands say so.
	_, err = runCLI(t, "statement", "--proxy", open)
	require.Error(t, err)
	assert.Contains(t, err.Error(), "without prices nothing is recorded")
	_, err = runCLI(t, "budget", "show", "--proxy", open)
	require.Error(t, err)
	assert.Contains(t, err.Error(), "prices no model")

	up := upstreamtest.New(upstreamtest.Options{})
	t.Cleanup(up.Close)
	c := startStint(t, nil, "serve", "--config", twoTeamConfig(t, up.URL(), t.TempDir()))
	at := "http://" + c.addr
	_, err = runCLI(t, "runs", "list", "--proxy", at)
	require.Error(t, err)
	assert.Contains(t, err.Error(), "wants a key (401): give --key KEY or set STINT_KEY")
	out, err = runCLI(t, "runs", "list", "--proxy", at, "--key", "lab-run-key")
	require.NoError(t, err, out)
	_, err = runCLI(t, "budget", "show", "--proxy", at, "--key", "lab-run-key")
	require.Error(t, err)
	assert.Contains(t, err.Error(), "refused the key")
	assert.Contains(t, err.Error(), adminKeyEnv)
	out, err = runCLI(t, "budget", "show", "--proxy", at, "--key", replicaAdminKey, "--json")
	require.NoError(t, err, out)
	var b budgetsAnswer
	require.NoError(t, json.Unmarshal([]byte(out), &b), out)
	out, err = runCLI(t, "statement", "--proxy", at, "--key", replicaAdminKey, "--json")
	require.NoError(t, err, out)
	var st budget.Statement
	require.NoError(t, json.Unmarshal([]byte(out), &st), out)
	_, err = runCLI(t, "runs", "list", "--proxy", at+"/somewhere-else", "--key", "lab-run-key")
	require.Error(t, err)
	assert.Contains(t, err.Error(), "--proxy must be a stint proxy's base URL")
	_, err = runCLI(t, "runs", "list", "--proxy", "127.0.0.1:1")
	require.Error(t, err)
	assert.Contains(t, err.Error(), "give the scheme too")
}

// TestStatementSaysWhenNothingIsRecorded: a statement of a store with no
// calls says why there may be none.
func TestStatementSaysWhenNothingIsRecorded(t *testing.T) {
	dir := t.TempDir()
	up := upstreamtest.New(upstreamtest.Options{})
	t.Cleanup(up.Close)
	cfg, err := resolveConfig(serveFlags{upstream: up.URL(), data: dir, listen: "127.0.0.1:0"})
	require.NoError(t, err)
	srv, err := buildServer(t.Context(), cfg, slog.New(slog.DiscardHandler), nil)
	require.NoError(t, err)
	require.NoError(t, srv.close())
	out, err := runCLI(t, "statement", "--data", dir)
	require.NoError(t, err, out)
	assert.Contains(t, out, "calls are recorded only while the proxy's config prices models")
}

// TestVersion: stint version and stint --version print the module
// version and the VCS revision, from Go's build stamping, else from what
// the linker set, else "unknown".
func TestVersion(t *testing.T) {
	a, err := runCLI(t, "version")
	require.NoError(t, err)
	b, err := runCLI(t, "--version")
	require.NoError(t, err)
	assert.Equal(t, a, b)
	assert.Regexp(t, `^stint \S+\nrevision .+\nbuilt with go`, a)

	stamped := &debug.BuildInfo{Main: debug.Module{Version: "v1.4.0"}, Settings: []debug.BuildSetting{{Key: "vcs.revision", Value: "abc123"}, {Key: "vcs.modified", Value: "true"}}}
	cases := []struct {
		name   string
		info   *debug.BuildInfo
		linked string
		want   string
	}{
		{"stamped", stamped, "", "stint v1.4.0\nrevision abc123 (with uncommitted changes)\n"},
		{"linked", &debug.BuildInfo{Main: debug.Module{Version: "(devel)"}}, "def456", "stint (devel)\nrevision def456\n"},
		{"neither", &debug.BuildInfo{Main: debug.Module{Version: "(devel)"}}, "", "stint (devel)\nrevision unknown (built without VCS stamping"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			assert.True(t, strings.HasPrefix(readBuild(c.info, true, c.linked, "").String(), c.want), readBuild(c.info, true, c.linked, "").String())
		})
	}
}

// TestKeysNewPastesIntoTheExampleConfig: what stint keys new prints goes
// into the example config as it is (flow style, like the example's own
// keys) and admits the key it printed.
func TestKeysNewPastesIntoTheExampleConfig(t *testing.T) {
	out, err := runCLI(t, "keys", "new", "--team", "kiln")
	require.NoError(t, err)
	key := strings.TrimSpace(strings.Split(out, "\n")[1])
	block := out[strings.Index(out, "\n\n  - name:")+2:]
	assert.Contains(t, block, `keys: ["sha256:`, "flow style, as the example config writes keys")
	pasted := strings.Replace(exampleConfig, "teams:\n", "teams:\n"+block, 1)
	cfg, err := ParseConfig(strings.NewReader(pasted))
	require.NoError(t, err, "the example config with the printed entry pasted in:\n%s", block)
	require.Len(t, cfg.Teams, 2)
	assert.Equal(t, "kiln", cfg.Teams[0].Name)
	assert.Equal(t, []string{"sha256:" + keyHash(key)}, cfg.Teams[0].Keys)

	out, err = runCLI(t, "keys", "new", "--admin")
	require.NoError(t, err)
	key = strings.TrimSpace(strings.Split(out, "\n")[1])
	block = out[strings.Index(out, "\nadmin:\n")+1:]
	pasted = strings.Replace(exampleConfig, "admin:\n  keys: []\n", block, 1)
	require.NotEqual(t, exampleConfig, pasted)
	cfg, err = ParseConfig(strings.NewReader(pasted))
	require.NoError(t, err, block)
	assert.Equal(t, []string{"sha256:" + keyHash(key)}, cfg.Admin.Keys)

	for _, name := range []string{"two words", "lab}", strings.Repeat("x", 129), "ünï"} {
		_, err := runCLI(t, "keys", "new", "--team", name)
		assert.ErrorContains(t, err, teamNameRule, name)
		_, err = ParseConfig(strings.NewReader(fmt.Sprintf("teams:\n  - name: %q\n    keys: [\"sha256:%s\"]\n", name, keyHash("k"))))
		assert.ErrorContains(t, err, "teams[0].name", name)
	}
}

// TestDemoStartsOnAFreshCache: a second stint demo on the same data
// directory starts afresh (its first search costs what the first demo's
// did), unless --keep-data, when it says it reused the cache; a data
// directory holding a store the demo did not make is refused, not wiped.
func TestDemoStartsOnAFreshCache(t *testing.T) {
	t.Setenv("STINT_MODEL", modeltest.Path(t))
	data := t.TempDir()
	firstShare := regexp.MustCompile(`(?m)^run \S+: \d+ scoring calls, .*, \d+ texts \(([0-9.]+)% of texts from the cache\)`)
	demo := func(extra ...string) string {
		args := append([]string{"demo", "--steps", "2", "--data", data, "--out", t.TempDir(), "--dataset", filepath.Join("..", "..", "testdata", "search")}, extra...)
		out, err := runCLI(t, args...)
		require.NoError(t, err, out)
		return out
	}
	one := demo()
	m := firstShare.FindStringSubmatch(one)
	require.NotNil(t, m, one)
	require.NotEqual(t, "100.0", m[1], "the first search of a fresh demo is not all cache")
	two := demo()
	assert.Contains(t, two, "a fresh cache in "+data)
	assert.Equal(t, m[1], firstShare.FindStringSubmatch(two)[1], "the second demo's first search, on a fresh cache, costs what the first's did")
	three := demo("--keep-data")
	assert.Contains(t, three, "reusing the cache an earlier demo left in "+data)
	assert.Equal(t, "100.0", firstShare.FindStringSubmatch(three)[1], "with --keep-data the first search is answered from the cache")

	foreign := t.TempDir()
	require.NoError(t, os.WriteFile(filepath.Join(foreign, "stint.db"), []byte("not the demo's"), 0o600))
	_, err := runCLI(t, "demo", "--data", foreign)
	require.ErrorContains(t, err, "holds a store an earlier demo did not leave")
	_, err = os.Stat(filepath.Join(foreign, "stint.db"))
	assert.NoError(t, err, "a store the demo did not make is never removed")
}
