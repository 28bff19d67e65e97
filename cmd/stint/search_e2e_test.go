package main

import (
	"bytes"
	"encoding/json"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task/tasktest"
)

// upstreamCalls sums stint_upstream_calls_total from a proxy's /metrics.
func upstreamCalls(t *testing.T, c *child) int {
	t.Helper()
	resp, err := http.Get("http://" + c.addr + "/metrics")
	require.NoError(t, err)
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	total := 0
	for _, m := range regexp.MustCompile(`(?m)^stint_upstream_calls_total\{[^}]*\} (\d+)`).FindAllSubmatch(b, -1) {
		n, _ := strconv.Atoi(string(m[1]))
		total += n
	}
	return total
}

// shortTask writes the example task, cut to a few steps, next to copies
// of its datasets.
func shortTask(t *testing.T) string {
	t.Helper()
	return tasktest.WriteExample(t, "steps: 90", "steps: 4", "prompts_per_step: 16", "prompts_per_step: 4",
		"examples_per_step: 8", "examples_per_step: 6")
}

// TestSearchReplaysToTheSameResults runs a short search through a real
// stint serve on the real model, whose prices make every miss cost
// something, then replays it from the proxy's journal: results.json, the
// contenders' spend included, comes out byte-for-byte the same and the
// replay makes no upstream call.
func TestSearchReplaysToTheSameResults(t *testing.T) {
	model := modeltest.Path(t)
	cfg := writeConfig(t, configHead(t.TempDir(), "local:"+model)+"prices:\n  stories260K: {input: 0.50, output: 1.50}   # invented test prices\n")
	c := startStint(t, nil, "serve", "--config", cfg)
	t.Setenv("STINT_MODEL", model)
	taskPath := shortTask(t)
	proxyURL := "http://" + c.addr + "/v1"
	first, second := t.TempDir(), t.TempDir()
	out, err := runCLI(t, "search", "run", taskPath, "--proxy", proxyURL, "--out", first, "--run", "reading-e2e")
	require.NoError(t, err, "search run: %v\n%s", err, out)
	assertProgressInEveryPhase(t, out)
	recorded := upstreamCalls(t, c)
	require.False(t, recorded == 0, "the search made no upstream call")
	out, err = runCLI(t, "search", "run", taskPath, "--proxy", proxyURL, "--out", second, "--run", "reading-e2e", "--replay")
	require.NoError(t, err, "search replay: %v\n%s", err, out)
	got := upstreamCalls(t, c)
	assert.Equal(t, recorded, got, "upstream calls went from %d to %d during the replay", recorded, got)
	a, err := os.ReadFile(filepath.Join(first, "results.json"))
	require.NoError(t, err)
	b, err := os.ReadFile(filepath.Join(second, "results.json"))
	require.NoError(t, err)
	// Source: the record/replay contract (README "Record and replay a
	// run"): a replay answers every call from the journal, byte for byte.
	assert.Truef(t, bytes.Equal(a, b), "replayed results differ:\n%s\nvs\n%s", a, b)
	var res search.Results
	require.NoError(t, json.Unmarshal(a, &res))
	for _, ct := range res.Ranking {
		assert.Falsef(t, ct.EvalCalls == 0 || ct.EvalSpendUSD <= 0, "%s: %d evaluation calls, %v USD; want the evaluation's calls and their cost", ct.Method, ct.EvalCalls, ct.EvalSpendUSD)
		searched := ct.Method != search.MethodEmpty && ct.Method != search.MethodManual
		assert.Falsef(t, searched != (ct.SearchCalls > 0 && ct.SearchSpendUSD > 0), "%s: %d search calls, %v USD", ct.Method, ct.SearchCalls, ct.SearchSpendUSD)
		// On its own a contender pays for every text it had judged first,
		// at the proxy's price before the cache: at least what it was
		// charged here, where some came from others' calls.
		assert.Falsef(t, searched != (ct.SearchNewTexts > 0 && ct.SearchAloneUSD >= ct.SearchSpendUSD*(1-1e-9)), "%s: %d new texts, %v USD alone for %v charged", ct.Method, ct.SearchNewTexts, ct.SearchAloneUSD, ct.SearchSpendUSD)
	}
	for _, name := range []string{"history.csv", "report.md", "learning-curve.png", "learning-curve.svg"} {
		st, err := os.Stat(filepath.Join(first, name))
		assert.Falsef(t, err != nil || st.Size() == 0, "%s missing or empty: %v", name, err)
	}
}

// assertProgressInEveryPhase: a search whose output is not a terminal
// prints a plain progress line (no carriage return) with a time left in
// every phase: the steps, the choice, each baseline of the example task and
// the evaluation.
func assertProgressInEveryPhase(t *testing.T, out string) {
	t.Helper()
	assert.Falsef(t, strings.Contains(out, "\r"), "progress redrawn with carriage returns on a non-terminal:\n%q", out)
	for _, phase := range []*regexp.Regexp{
		regexp.MustCompile(`(?m)^\[[#.]+\] step \d+/\d+ .* eta \S+$`),
		regexp.MustCompile(`(?m)^\[[#.]+\] choice +\d+/\d+ judgements .* eta \S+$`),
		regexp.MustCompile(`(?m)^\[[#.]+\] best-of-n +\d+/\d+ judgements .* eta \S+$`),
		regexp.MustCompile(`(?m)^\[[#.]+\] halving +\d+/\d+ judgements .* eta \S+$`),
		regexp.MustCompile(`(?m)^\[[#.]+\] evaluation +\d+/\d+ contenders .* eta \S+$`),
	} {
		assert.Truef(t, phase.MatchString(out), "no progress line like %s in:\n%s", phase, out)
	}
}

// TestDemoRunsOfflineAndSaves runs a short `stint demo`: the local model,
// the proxy and two searches; the second is answered from the cache and
// the printed savings say so.
func TestDemoRunsOfflineAndSaves(t *testing.T) {
	t.Setenv("STINT_MODEL", modeltest.Path(t))
	out, err := runCLI(t, "demo", "--steps", "3", "--data", t.TempDir(), "--out", t.TempDir(),
		"--dataset", filepath.Join("..", "..", "testdata", "search"))
	require.NoError(t, err, "stint demo: %v\n%s", err, out)
	m := regexp.MustCompile(`upstream calls (\d+), [0-9.]+% of calls from the cache, calls saved (\d+)`).FindStringSubmatch(out)
	require.Falsef(t, m == nil, "no savings line in:\n%s", out)
	upstream, _ := strconv.Atoi(m[1])
	saved, _ := strconv.Atoi(m[2])
	// Source: hand-reasoned from the demo: its second search repeats the
	// first call for call, so every one of its calls is saved.
	assert.Falsef(t, upstream == 0 || saved < upstream, "demo: %d upstream calls, %d saved; the repeated search should be served from the cache", upstream, saved)
	assert.Contains(t, out, "100.0% of texts from the cache", "the second search was not served from the cache:\n%s", out)
}

// TestDemoWithoutModelSaysHowToGetIt runs the demo without its model
// file, given by --model, by $STINT_MODEL or not at all (the cached
// download), and follows the instructions as far as they go offline: the
// download can't run here, so the real model file is put where the message
// says the download writes it; then the command the message names must
// run (its flags parse; with the file there it exits without serving or
// downloading), and the model must be found where the demo looks.
func TestDemoWithoutModelSaysHowToGetIt(t *testing.T) {
	model := modeltest.Path(t)
	blob, err := os.ReadFile(model)
	require.NoError(t, err)
	tests := []struct {
		name      string
		flag, env string // --model and $STINT_MODEL given to the demo
		cache     bool   // neither: the user cache dir
		want      string // the command the message must name
	}{
		{"--model", filepath.Join(t.TempDir(), "flag", "stories260K.gguf"), "", false, "stint local --download-only --model "},
		{"STINT_MODEL", "", filepath.Join(t.TempDir(), "env", "m.gguf"), false, "stint local --download-only"},
		{"neither", "", "", true, "stint local --download-only"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cacheDir := t.TempDir()
			t.Setenv("XDG_CACHE_HOME", cacheDir)
			t.Setenv("STINT_MODEL", tt.env)
			args := []string{"demo", "--data", t.TempDir()}
			if tt.flag != "" {
				args = append(args, "--model", tt.flag)
			}
			_, err := runCLI(t, args...)
			require.Error(t, err, "the demo ran without its model")
			msg := err.Error()
			cmdLine := regexp.MustCompile(`(?m)^ +(stint local .*)$`).FindStringSubmatch(msg)
			target := regexp.MustCompile(`it writes (\S+) `).FindStringSubmatch(msg)
			require.Falsef(t, cmdLine == nil || target == nil || !strings.HasPrefix(cmdLine[1], tt.want), "message names no %q command and target:\n%s", tt.want, msg)
			want := tt.flag + tt.env
			if tt.cache {
				want = filepath.Join(cacheDir, "stint", "models", "stories260K.gguf")
			}
			// Source: localmodel.Locate's order (--model, STINT_MODEL,
			// the cached download) is where the demo looks.
			assert.Equal(t, want, target[1], "the message says the download writes %s, want %s (where the demo looks)", target[1], want)
			// Stand in for the download, then run the named command.
			require.NoError(t, os.MkdirAll(filepath.Dir(target[1]), 0o755))
			require.NoError(t, os.WriteFile(target[1], blob, 0o600))
			out, err := runCLI(t, strings.Fields(cmdLine[1])[1:]...)
			assert.Falsef(t, err != nil || !strings.Contains(out, "already there"), "%s: %v\n%s, want it to find the file and exit", cmdLine[1], err, out)
			got, err := localmodel.Locate(tt.flag, os.Getenv)
			assert.Falsef(t, err != nil || got != want, "after the instructions the demo finds %q, %v; want %s", got, err, want)
		})
	}
}

// TestSearchRefusesToStartOverOrWithoutAPrice never reaches a proxy: the
// forecast is over the task's cap, or the task has a cap and no price, so
// the search does not start and says what to set.
func TestSearchRefusesToStartOverOrWithoutAPrice(t *testing.T) {
	t.Setenv("STINT_MODEL", modeltest.Path(t))
	unpriced := shortTask(t)
	raw, err := os.ReadFile(unpriced)
	require.NoError(t, err)
	noPrices := regexp.MustCompile(`(?m)^prices:\n(  .*\n)+`).ReplaceAll(raw, nil)
	require.False(t, bytes.Equal(noPrices, raw), "the example task has no prices section to remove")
	require.NoError(t, os.WriteFile(unpriced, noPrices, 0o600))
	tests := []struct {
		name string
		args []string
		want []string // in the error
	}{
		// Source: the refusal rules of search.CheckCap (README "Prompt
		// search"); 10⁶ USD per million tokens is absurdly over any cap.
		{"forecast over the cap", []string{shortTask(t), "--input-price", "1000000", "--output-price", "1000000"}, []string{"spend_cap_usd", "--over-cap"}},
		{"cap and no price", []string{unpriced}, []string{"prices.input_per_million", "--input-price", "prices.output_per_million", "--over-cap"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			out, err := runCLI(t, append(append([]string{"search", "run"}, tt.args...), "--proxy", "http://127.0.0.1:1/v1", "--out", t.TempDir())...)
			require.Falsef(t, err == nil || !strings.Contains(out, "forecast:"), "search: %v\n%s, want a refusal after the forecast", err, out)
			for _, w := range tt.want {
				assert.Contains(t, err.Error(), w, "refusal %q does not name %q", err, w)
			}
		})
	}
}

// TestSearchStopsAtItsSpendCap runs against a proxy that prices the model:
// started over its cap (--over-cap), the search stops once the spend the
// proxy reports reaches the task's cap.
func TestSearchStopsAtItsSpendCap(t *testing.T) {
	model := modeltest.Path(t)
	t.Setenv("STINT_MODEL", model)
	cfg := writeConfig(t, configHead(t.TempDir(), "local:"+model)+"prices:\n  stories260K: {input: 0.50, output: 1.50}   # invented test prices\n")
	c := startStint(t, nil, "serve", "--config", cfg)
	path := shortTask(t)
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	tiny := regexp.MustCompile(`(?m)^spend_cap_usd: [0-9.]+`).ReplaceAll(raw, []byte("spend_cap_usd: 0.000001"))
	require.False(t, bytes.Equal(tiny, raw), "the example task has no spend_cap_usd line to change")
	require.NoError(t, os.WriteFile(path, tiny, 0o600))
	out, err := runCLI(t, "search", "run", path, "--proxy", "http://"+c.addr+"/v1", "--out", t.TempDir(), "--over-cap")
	// Source: the task's spend_cap_usd is held by the spend the proxy
	// reports (Stint-Cost-Usd); one priced miss is over 10⁻⁶ USD.
	assert.Falsef(t, err == nil || !strings.Contains(err.Error(), "spend cap is reached") || !strings.Contains(out, "starting over the cap"), "search with a tiny cap: %v\n%s, want it started over the cap and stopped there", err, out)
}

// TestResumedSearchFollowsTheSameTrajectory records an uninterrupted
// search, then runs the same search in replay mode in two pieces: stopped
// after step 2 with a checkpoint, and resumed from it. A replay answers
// only the calls the recording made, so a resumed search that strayed from
// the recorded trajectory would fail; it finishes with the same
// results.json and history.csv, byte for byte.
func TestResumedSearchFollowsTheSameTrajectory(t *testing.T) {
	model := modeltest.Path(t)
	c := startStint(t, nil, "serve", "--listen", "127.0.0.1:0", "--upstream", "local:"+model, "--data", t.TempDir())
	t.Setenv("STINT_MODEL", model)
	taskPath := shortTask(t)
	proxyURL := "http://" + c.addr + "/v1"
	whole, pieces := t.TempDir(), t.TempDir()
	out, err := runCLI(t, "search", "run", taskPath, "--proxy", proxyURL, "--out", whole, "--run", "reading-resume")
	require.NoError(t, err, "search run: %v\n%s", err, out)
	calls := upstreamCalls(t, c)
	replay := []string{"search", "run", taskPath, "--proxy", proxyURL, "--out", pieces, "--run", "reading-resume", "--replay", "--checkpoint-every", "1"}
	out, err = runCLI(t, append(replay, "--stop-after", "2")...)
	require.Falsef(t, err != nil || !strings.Contains(out, "stopped early"), "first piece: %v\n%s", err, out)
	_, err = os.Stat(filepath.Join(pieces, "results.json"))
	require.Error(t, err, "a stopped search wrote results")
	out, err = runCLI(t, append(replay, "--resume")...)
	require.Falsef(t, err != nil || !strings.Contains(out, "resuming after step 2"), "resumed piece: %v\n%s", err, out)
	// Source: the checkpoint contract (README "Prompt search"): a resumed
	// run follows exactly the trajectory of an uninterrupted one.
	// results.json has the end; history.csv every step's reward, loss,
	// accuracies and greedy prompt, so the whole trajectory is compared.
	for _, name := range []string{"results.json", "history.csv"} {
		a, err := os.ReadFile(filepath.Join(whole, name))
		require.NoError(t, err)
		b, err := os.ReadFile(filepath.Join(pieces, name))
		assert.Falsef(t, err != nil || !bytes.Equal(a, b), "resumed %s differs (%v):\n%s\nvs\n%s", name, err, a, b)
	}
	got := upstreamCalls(t, c)
	assert.Equal(t, calls, got, "upstream calls %d → %d during the replayed pieces", calls, got)
}

// TestSearchRunAndServeTakeTheSamePriceFlags: both commands override the
// task's prices with --input-price and --output-price, which refuse what
// is not a USD amount.
func TestSearchRunAndServeTakeTheSamePriceFlags(t *testing.T) {
	root := newRootCmd()
	for _, path := range [][]string{{"search", "run"}, {"search", "serve"}} {
		cmd, _, err := root.Find(path)
		require.NoError(t, err)
		for _, name := range []string{"input-price", "output-price"} {
			fl := cmd.Flags().Lookup(name)
			if !assert.NotNilf(t, fl, "%s has no --%s", strings.Join(path, " "), name) {
				continue
			}
			for _, tt := range []struct {
				value string
				ok    bool
			}{{"0.5", true}, {"0", true}, {"-1", false}, {"NaN", false}, {"+Inf", false}, {"cheap", false}} {
				err := fl.Value.Set(tt.value)
				assert.Falsef(t, (err == nil) != tt.ok, "%s --%s %s: %v, want ok=%v", strings.Join(path, " "), name, tt.value, err, tt.ok)
			}
		}
	}
}

// TestProgressLine: the status line shows the floored-verbalizer share, and
// its ETA is paced by the steps this process ran (those since the
// checkpoint on a resumed search), not by all steps so far. Hand-worked:
// 4 steps in 40 s leave 6 steps, 60 s.
func TestProgressLine(t *testing.T) {
	tests := []struct {
		name         string
		step, resume int
		want         time.Duration
	}{
		{"fresh", 4, 0, 60 * time.Second},
		{"resumed after step 2", 6, 2, 40 * time.Second}, // 4 steps in 40 s, 4 left
		{"no step run yet", 2, 2, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			p := search.Progress{Step: tt.step, Steps: 10, ResumedAfter: tt.resume}
			got := eta(40*time.Second, p)
			assert.Equal(t, tt.want, got, "eta = %v, want %v", got, tt.want)
		})
	}
	line := progressText(search.Progress{Phase: search.PhaseSearch, Step: 1, Steps: 2, DevAcc: -1, FlooredShare: 0.125}, time.Now(), time.Now())
	assert.Contains(t, line, "floored 12.5%", "progress line %q lacks the floored share", line)
}

// TestSidecarAndLocalListenApart: `stint search serve` and `stint local`
// can run side by side with their defaults. Source: the deployment files
// run the sidecar on 8789 (deploy/compose.yaml, deploy/k8s/search.yaml).
func TestSidecarAndLocalListenApart(t *testing.T) {
	root := newRootCmd()
	listen := map[string]string{}
	for _, path := range [][]string{{"search", "serve"}, {"local"}, {"serve"}} {
		cmd, _, err := root.Find(path)
		require.NoError(t, err)
		if fl := cmd.Flags().Lookup("listen"); fl != nil {
			listen[strings.Join(path, " ")] = fl.DefValue
		}
	}
	got := listen["search serve"]
	assert.Falsef(t, got != "127.0.0.1:8789" || got == listen["local"], "defaults: %v, want search serve on 127.0.0.1:8789, apart from local's", listen)
}
