package main

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
)

// pricedConfig is a config for `stint serve` on the local model at invented
// prices, with an admin key and, when budgetUSD is set, one team on that
// total budget.
func pricedConfig(t *testing.T, model, data, budgetUSD string) (path, key, admin string) {
	t.Helper()
	key, admin = "lab-search-key", "lab-admin-key"
	text := configHead(data, "local:"+model) + "prices:\n  stories260K: {input: 0.50, output: 1.50}   # invented test prices\n"
	if budgetUSD != "" {
		text += fmt.Sprintf("teams:\n  - name: lab\n    keys: [\"sha256:%s\"]\n    budget: {usd: %s, per: total}\nadmin:\n  keys: [\"sha256:%s\"]\n",
			keyHash(key), budgetUSD, keyHash(admin))
	}
	return writeConfig(t, text), key, admin
}

func readResults(t *testing.T, dir string) ([]byte, search.Results) {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(dir, "results.json"))
	require.NoError(t, err)
	var r search.Results
	require.NoError(t, json.Unmarshal(b, &r))
	return b, r
}

// TestBudgetRefusalResumesAndReplays: a search whose team budget runs out
// part way (402), in the best-of-n baseline or in the search's steps before
// its first checkpoint, keeps what it finished (results.json with the
// contenders found so far, a checkpoint) and prints the exact command that
// goes on. Its budget raised, that command finishes the search; replayed
// from the proxy's journal, the search writes the same results.json byte
// for byte, spend included, and both equal an uninterrupted search's on a
// fresh proxy.
func TestBudgetRefusalResumesAndReplays(t *testing.T) {
	model := modeltest.Path(t)
	t.Setenv("STINT_MODEL", model)
	taskPath := shortTask(t)

	// The uninterrupted search, on a proxy of its own, says where a
	// budget runs out.
	cfg, _, _ := pricedConfig(t, model, t.TempDir(), "")
	free := startStint(t, nil, "serve", "--config", cfg)
	whole := t.TempDir()
	out, err := runCLI(t, "search", "run", taskPath, "--proxy", "http://"+free.addr+"/v1", "--out", whole, "--run", "reading-402")
	require.NoError(t, err, out)
	wholeJSON, wholeRes := readResults(t, whole)
	bon, ok := wholeRes.Contender(task.BestOfN)
	require.True(t, ok, "the example runs best-of-n")

	tests := []struct {
		name   string
		budget float64
		extra  []string
		where  string   // in the error
		found  []string // contenders kept
	}{
		// Past the RL search and its choice, half way through best-of-n.
		{"in a baseline", wholeRes.Best.SearchSpendUSD + bon.SearchSpendUSD/2, nil, "best-of-n baseline", []string{search.MethodRL, search.MethodEmpty, search.MethodManual}},
		// A third of the way through the steps, with no checkpoint
		// written yet: it goes on from the start.
		{"in the steps", wholeRes.Best.SearchSpendUSD / 3, []string{"--checkpoint-every", "100"}, "step", nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg, key, admin := pricedConfig(t, model, t.TempDir(), strconv.FormatFloat(tt.budget, 'f', 9, 64))
			c := startStint(t, nil, "serve", "--config", cfg)
			proxyURL := "http://" + c.addr + "/v1"
			dir := t.TempDir()
			args := append([]string{"search", "run", taskPath, "--proxy", proxyURL, "--key", key, "--out", dir, "--run", "reading-402"}, tt.extra...)
			out, err := runCLI(t, args...)
			require.Error(t, err, "the budget should run out:\n%s", out)
			assert.Contains(t, err.Error(), "budget exhausted")
			assert.Contains(t, err.Error(), tt.where)

			// What was finished is kept: the contenders found, not yet
			// evaluated, and a checkpoint.
			_, partial := readResults(t, dir)
			assert.NotEmpty(t, partial.Stopped)
			var methods []string
			for _, ct := range partial.Ranking {
				methods = append(methods, ct.Method)
				assert.Equal(t, -1.0, ct.DevAcc, "%s is not evaluated yet", ct.Method)
			}
			for _, m := range tt.found {
				assert.Contains(t, methods, m)
			}
			assert.NotContains(t, methods, task.BestOfN)
			assert.FileExists(t, filepath.Join(dir, search.CheckpointFile))

			// The hint names the command that goes on: this one with
			// --resume.
			line := ""
			for _, l := range strings.Split(out, "\n") {
				if strings.Contains(l, "--resume") {
					line = strings.TrimSpace(l)
				}
			}
			require.NotEmpty(t, line, "no --resume command in:\n%s", out)
			for _, want := range []string{"stint search run " + taskPath + " ", "--proxy " + proxyURL, "--key " + key, "--out " + dir, "--run reading-402", strings.Join(tt.extra, " ")} {
				assert.Contains(t, line, want)
			}
			assert.Contains(t, out, "stint budget set")

			out, err = runCLI(t, "budget", "set", "--team", "lab", "--usd", "100", "--per", "total", "--proxy", proxyURL, "--key", admin)
			require.NoError(t, err, out)
			out, err = runCLI(t, append(args, "--resume")...)
			require.NoError(t, err, out)
			spent := regexp.MustCompile(`texts from the cache\), ([0-9.]+) USD reported by the proxy`).FindStringSubmatch(out)
			require.NotNil(t, spent, "no summary line in:\n%s", out)
			resumed, res := readResults(t, dir)
			assert.Empty(t, res.Stopped)

			again := t.TempDir()
			out, err = runCLI(t, "search", "run", taskPath, "--proxy", proxyURL, "--key", key, "--out", again, "--run", "reading-402", "--replay")
			require.NoError(t, err, out)
			charged := regexp.MustCompile(`the recording was charged ([0-9.]+) USD`).FindStringSubmatch(out)
			require.NotNil(t, charged, "the replay's summary names the recorded spend:\n%s", out)
			assert.Equal(t, spent[1], charged[1], "the replay's summary says what the resumed search reported")
			replayed, _ := readResults(t, again)
			// Source: the record/replay contract (README "Record and
			// replay a run"): a replay answers every call as recorded, so
			// its results are the recorded run's, byte for byte.
			assert.True(t, string(resumed) == string(replayed), "the replay of the resumed search differs:\n%s\nvs\n%s", resumed, replayed)
			// Source: hand-reasoned: the resumed search asked no call
			// twice and the refused calls were not charged, so it made
			// the uninterrupted search's calls at its charges.
			assert.True(t, string(wholeJSON) == string(resumed), "the resumed search differs from the uninterrupted one:\n%s\nvs\n%s", wholeJSON, resumed)
		})
	}
}

// TestPrintedExampleRunsAsPrinted follows the help: in a directory laid out
// as the repository root (the demo data in testdata/search), `stint search
// example > task.yaml` and `stint search run task.yaml --out ./task-out`
// find the data and start within the task's spend cap, with no other edit
// (--proxy names the test's proxy; --stop-after keeps it short).
func TestPrintedExampleRunsAsPrinted(t *testing.T) {
	model := modeltest.Path(t)
	t.Setenv("STINT_MODEL", model)
	c := startStint(t, nil, "serve", "--listen", "127.0.0.1:0", "--upstream", "local:"+model, "--data", t.TempDir())
	root := t.TempDir()
	require.NoError(t, os.MkdirAll(filepath.Join(root, "testdata", "search"), 0o755))
	for _, name := range []string{"reading-corner-train.jsonl", "reading-corner-dev.jsonl", "reading-corner-test.jsonl"} {
		b, err := os.ReadFile(filepath.Join("..", "..", "testdata", "search", name))
		require.NoError(t, err)
		require.NoError(t, os.WriteFile(filepath.Join(root, "testdata", "search", name), b, 0o600))
	}
	t.Chdir(root)
	example, err := runCLI(t, "search", "example")
	require.NoError(t, err)
	require.NoError(t, os.WriteFile("task.yaml", []byte(example), 0o600))
	out, err := runCLI(t, "search", "run", "task.yaml", "--out", "./task-out", "--proxy", "http://"+c.addr, "--stop-after", "1")
	require.NoError(t, err, out)
	assert.Contains(t, out, "stopped early after step 1")
	assert.NotContains(t, out, "over the cap")
}
