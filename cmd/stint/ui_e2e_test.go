package main

import (
	"context"
	"encoding/base64"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/chromedp/cdproto/cdp"
	"github.com/chromedp/cdproto/emulation"
	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/chromedp"
	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/proxy/localmodel/modeltest"
	"github.com/stintlab/stint/proxy/upstreamtest"
	"github.com/stintlab/stint/searcher/jobs"
)

// Keys of the operator page test (invented).
const (
	uiAdminKey = "sk-admin-ui-e2e-7f3a"
	uiLabKey   = "sk-lab-ui-e2e-19c4"
	uiKilnKey  = "sk-kiln-ui-e2e-52d8"
	uiUpKey    = "sk-upstream-ui-e2e-b611"
)

// chromiumPath finds Debian's chromium. Outside CI a missing browser skips
// the test; in CI (CI=true) it fails it, since .ci/run installs chromium.
func chromiumPath(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	require.False(t, os.Getenv("CI") == "true", "chromium is not installed; .ci/run installs it (apt-get install chromium)")
	t.Skip("chromium is not installed (apt-get install chromium); the operator page's browser test needs it")
	return ""
}

// artifactDir is where screenshots go: $STINT_ARTIFACTS when set, else a
// temporary directory.
func artifactDir(t *testing.T) string {
	t.Helper()
	if d := os.Getenv("STINT_ARTIFACTS"); d != "" {
		require.NoError(t, os.MkdirAll(d, 0o755))
		return d
	}
	return t.TempDir()
}

// uiRig is a proxy wired as stint serve wires it (the spend control, store
// and run journal of the embedded file), on a fake paid upstream and the
// local model, with a search sidecar serving the real job API. The sidecar
// reaches the proxy through gate, which holds a search between steps.
type uiRig struct {
	url     string // the proxy's base URL
	proxy   *proxy.Proxy
	reg     *prometheus.Registry
	up      *upstreamtest.Server
	sidecar string
	jobs    *jobs.Manager
	gate    *stepGate
}

// stepGate stands between the sidecar and the proxy, forwarding every call
// unchanged, except that while a limit is set it holds each call that
// arrives once the watched search's curve has that many points. A search
// checkpoints its curve after each step before it sends the next step's
// calls, so with limit n the search stops at exactly n points until the
// limit is raised.
type stepGate struct {
	next http.Handler

	mu      sync.Mutex
	limit   int        // points the curve may reach; negative: no limit
	points  func() int // the watched search's points so far
	changed chan struct{}
}

func newStepGate(next http.Handler) *stepGate {
	return &stepGate{next: next, limit: -1, changed: make(chan struct{})}
}

// Hold lets the search whose curve points reports reach limit points and
// no more; a negative limit lets every call through.
func (g *stepGate) Hold(points func() int, limit int) {
	g.mu.Lock()
	defer g.mu.Unlock()
	g.points, g.limit = points, limit
	close(g.changed)
	g.changed = make(chan struct{})
}

// ServeHTTP implements http.Handler.
func (g *stepGate) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	for {
		g.mu.Lock()
		limit, points, changed := g.limit, g.points, g.changed
		g.mu.Unlock()
		if limit < 0 || points() < limit {
			break
		}
		select {
		case <-changed:
		case <-r.Context().Done():
			http.Error(w, "step gate: the caller gave up", http.StatusServiceUnavailable)
			return
		}
	}
	g.next.ServeHTTP(w, r)
}

func newUIRig(t *testing.T) *uiRig {
	t.Helper()
	modelPath := modeltest.Path(t)
	up := upstreamtest.New(upstreamtest.Options{Key: uiUpKey})
	t.Cleanup(up.Close)
	t.Setenv("STINT_UI_UPSTREAM_KEY", uiUpKey)

	// The proxy's address must be known before the sidecar opens, and the
	// sidecar's before the proxy is built.
	proxySrv := httptest.NewUnstartedServer(nil)
	proxyURL := "http://" + proxySrv.Listener.Addr().String()
	m, err := localmodel.Load(modelPath)
	require.NoError(t, err)
	target, err := url.Parse(proxyURL)
	require.NoError(t, err)
	gate := newStepGate(httputil.NewSingleHostReverseProxy(target))
	gateSrv := httptest.NewServer(gate)
	mgr, err := jobs.Open(t.TempDir(), m, jobs.Options{Proxy: gateSrv.URL + "/v1", Key: uiLabKey, CheckpointEvery: 1})
	require.NoError(t, err)
	sidecar := httptest.NewServer(mgr.Handler())

	text := fmt.Sprintf(`listen: 127.0.0.1:0
data: %s
upstreams:
  - name: quill
    url: %s
    key_env: STINT_UI_UPSTREAM_KEY
    models: ["quill-*"]
    breaker: {consecutive_failures: 2, failure_ratio: -1, open_for: 1h}   # trips in traffic, stays open for the test
  - name: local
    url: local:%s
    models: [stories260K]
teams:
  - name: lab
    keys: ["sha256:%s"]
    budget: {usd: 0.25, per: total}
  - name: kiln
    keys: ["sha256:%s"]
    budget: {usd: 0.01, per: day}
  - name: quarry
    keys: ["sha256:%s"]
prices:   # invented test prices, USD per million tokens
  quill-small: {input: 40.0, output: 120.0}
  stories260K: {input: 0.50, output: 1.50}
admin:
  keys: ["sha256:%s"]
ui:
  search_sidecar: %s
  refresh: 250ms
`, t.TempDir(), up.URL(), modelPath, keyHash(uiLabKey), keyHash(uiKilnKey), keyHash("sk-quarry-unused"), keyHash(uiAdminKey), sidecar.URL)
	cfg, err := ParseConfig(strings.NewReader(text))
	require.NoError(t, err)

	ctx := context.Background()
	s := &server{cfg: cfg, log: slog.New(slog.DiscardHandler)}
	disk, err := boltstore.Open(filepath.Join(cfg.Data, "stint.db"), boltstore.Options{BatchDelay: time.Millisecond})
	require.NoError(t, err)
	s.closers = append(s.closers, disk.Close)
	s.commits = disk.Update
	ups, closers, err := buildUpstreams(ctx, cfg.Upstreams)
	require.NoError(t, err)
	s.closers = append(s.closers, closers...)
	teams, err := buildTeams(cfg.Teams)
	require.NoError(t, err)
	spend, err := s.buildSpend(ctx, cfg, disk)
	require.NoError(t, err)
	journal, err := runs.NewBolt(disk.DB(), runs.BoltOptions{Update: s.commits})
	require.NoError(t, err)
	adminHash, _ := parseKeyHash(cfg.Admin.Keys[0])
	reg := prometheus.NewRegistry()
	p, err := proxy.New(proxy.Options{
		Store: disk, Upstreams: ups, Teams: teams, Registerer: reg, Gatherer: reg, Spend: spend, Runs: journal,
		AdminKeyHashes: [][32]byte{adminHash},
		UI:             proxy.UIOptions{SearchSidecar: cfg.UI.SearchSidecar, Refresh: time.Duration(cfg.UI.Refresh)},
	})
	require.NoError(t, err)
	r := &uiRig{url: proxyURL, proxy: p, reg: reg, up: up, sidecar: sidecar.URL, jobs: mgr, gate: gate}
	proxySrv.Config.Handler = p
	proxySrv.Start()
	t.Cleanup(func() {
		gate.Hold(nil, -1)
		mgr.Close()
		sidecar.Close()
		gateSrv.Close()
		proxySrv.Close()
		_ = p.Close(context.Background())
		_ = s.close()
	})
	return r
}

// call sends one completion request with key and extra headers, and
// returns the cache outcome.
func (r *uiRig) call(t *testing.T, key, body string, header ...string) string {
	t.Helper()
	status, b, outcome := r.post(t, key, body, header...)
	if status != http.StatusOK {
		t.Fatalf("POST %s: %d %s", body, status, b)
	}
	return outcome
}

// post sends one completion request and returns its status, body and
// cache outcome.
func (r *uiRig) post(t *testing.T, key, body string, header ...string) (int, []byte, string) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodPost, r.url+"/v1/completions", strings.NewReader(body))
	req.Header.Set("Authorization", "Bearer "+key)
	req.Header.Set("Content-Type", "application/json")
	for i := 0; i+1 < len(header); i += 2 {
		req.Header.Set(header[i], header[i+1])
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, b, cacheOutcome(resp.Header)
}

func quillBody(prompt string) string {
	return fmt.Sprintf(`{"model":"quill-small","prompt":%q,"temperature":0,"max_tokens":5}`, prompt)
}

// traffic makes every cache outcome at least once on the fake upstream,
// and a recorded run.
func (r *uiRig) traffic(t *testing.T) {
	t.Helper()
	want := func(got, outcome string) {
		t.Helper()
		require.Equal(t, outcome, got, "cache outcome %q, want %q", got, outcome)
	}
	want(r.call(t, uiLabKey, quillBody("the barge leaves at dawn")), "miss")
	want(r.call(t, uiLabKey, quillBody("the hives are counted twice")), "miss")
	for range 3 {
		want(r.call(t, uiLabKey, quillBody("the barge leaves at dawn")), "hit")
	}
	want(r.call(t, uiLabKey, `{"model":"quill-small","prompt":"a sampled note","temperature":0.8,"max_tokens":5}`), "bypass")
	want(r.call(t, uiLabKey, `{"model":"quill-small","prompt":["the hives are counted twice","a new line for the ledger"],"temperature":0,"max_tokens":5}`), "partial")
	want(r.call(t, uiKilnKey, quillBody("kiln fires on thursday")), "miss")

	// Two identical calls in flight at once share one upstream call.
	r.up.Block()
	outcomes := make([]string, 2)
	var wg sync.WaitGroup
	for i := range outcomes {
		wg.Add(1)
		go func() {
			defer wg.Done()
			outcomes[i] = r.call(t, uiLabKey, quillBody("two keepers ask at once"))
		}()
	}
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	require.NoError(t, r.up.AwaitHeld(ctx, 1))
	for gaugeOf(t, r.reg, "stint_coalesced_waiting") != 1 {
		select {
		case <-ctx.Done():
			require.FailNow(t, "the second call never waited on the first")
		case <-time.After(5 * time.Millisecond):
		}
	}
	r.up.Release()
	wg.Wait()
	require.Falsef(t, !(outcomes[0] == "miss" && outcomes[1] == "shared" || outcomes[0] == "shared" && outcomes[1] == "miss"), "concurrent identical calls: %v, want one miss and one shared", outcomes)

	// One call the upstream refuses: the page counts it as failed (a 4xx
	// is the caller's fault, so the breaker does not count it).
	r.up.FailNext(1, upstreamtest.Fault{Status: http.StatusBadRequest})
	status, b, _ := r.post(t, uiLabKey, quillBody("a line the upstream refuses"))
	require.Equal(t, http.StatusBadRequest, status, "refused call: %d %s, want the upstream's 400 passed through", status, b)

	// A recorded run: a miss, then the same call again from the cache.
	want(r.call(t, uiLabKey, quillBody("pear orchard rota"), proxy.HeaderRun, "pear-tune"), "miss")
	want(r.call(t, uiLabKey, quillBody("pear orchard rota"), proxy.HeaderRun, "pear-tune"), "hit")

	// quill's breaker trips: two server errors in a row (its
	// consecutive_failures), then a miss is refused without reaching it.
	r.up.FailNext(2, upstreamtest.Fault{Status: http.StatusInternalServerError})
	for _, prompt := range []string{"the mill wheel stalls", "the mill wheel stalls again"} {
		status, b, _ := r.post(t, uiLabKey, quillBody(prompt))
		require.Equal(t, http.StatusInternalServerError, status, "failing call: %d %s, want the upstream's 500 passed through", status, b)
	}
	reached := r.up.Calls()
	status, b, _ = r.post(t, uiLabKey, quillBody("the mill wheel is mended"))
	require.Equal(t, http.StatusServiceUnavailable, status, "call after two failures: %d %s, want 503 from quill's open breaker", status, b)
	got := r.up.Calls()
	require.Equal(t, reached, got, "the open breaker let a call through: upstream calls %+v, then %+v", reached, got)
}

func gaugeOf(t *testing.T, g prometheus.Gatherer, name string) float64 {
	t.Helper()
	mfs, err := g.Gather()
	require.NoError(t, err)
	for _, mf := range mfs {
		if mf.GetName() == name && len(mf.GetMetric()) > 0 {
			return mf.GetMetric()[0].GetGauge().GetValue()
		}
	}
	return math.NaN()
}

// getJSON fetches url with an Authorization header into dst.
func getJSON(t *testing.T, url, auth string, dst any) {
	t.Helper()
	req, _ := http.NewRequest(http.MethodGet, url, nil)
	if auth != "" {
		req.Header.Set("Authorization", auth)
	}
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	require.Equal(t, http.StatusOK, resp.StatusCode, "GET %s: %d %s", url, resp.StatusCode, b)
	err = json.Unmarshal(b, dst)
	require.NoError(t, err, "GET %s: %v", url, err)
}

// scrape parses the proxy's /metrics with the Prometheus text parser.
func (r *uiRig) scrape(t *testing.T) map[string]*dto.MetricFamily {
	t.Helper()
	req, err := http.NewRequest(http.MethodGet, r.url+"/metrics", nil)
	require.NoError(t, err)
	req.Header.Set("Authorization", "Bearer "+uiAdminKey) // the config has teams: metrics need a key
	resp, err := http.DefaultClient.Do(req)
	require.NoError(t, err)
	defer resp.Body.Close()
	p := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := p.TextToMetricFamilies(resp.Body)
	require.NoError(t, err)
	return fams
}

func labelOf(m *dto.Metric, name string) string {
	for _, lp := range m.GetLabel() {
		if lp.GetName() == name {
			return lp.GetValue()
		}
	}
	return ""
}

// figure is one [data-figure] element of the page.
type figure struct {
	Value string `json:"value"`
	Text  string `json:"text"`
}

const readFigures = `Object.fromEntries(Array.from(document.querySelectorAll("[data-figure]"),
  e => [e.getAttribute("data-figure"), {value: e.getAttribute("data-value"), text: e.textContent.trim()}]))`

// TestOperatorPageInABrowser loads /ui in headless Chromium against a live
// proxy with traffic on every cache outcome, a recorded run, one upstream
// whose breaker has tripped and a real search running on the sidecar. The
// page updates itself while the test watches (a new request, and the
// search's curve growing while the gate holds the search between steps),
// and the figures it finally shows match /metrics, what `stint statement`
// prints, the run API and the sidecar. Screenshots in light and dark go to
// $STINT_ARTIFACTS (or a temporary directory).
func TestOperatorPageInABrowser(t *testing.T) {
	chrome := chromiumPath(t)
	r := newUIRig(t)
	r.traffic(t)

	// A search on the sidecar, through the proxy, recorded as run reading-ui,
	// held after its first step until the page has shown it.
	var job jobs.Status
	var submitted sync.WaitGroup
	submitted.Add(1)
	curvePoints := func() int {
		submitted.Wait()
		h, err := r.jobs.History(job.ID)
		if err != nil {
			return math.MaxInt // unreadable: hold until the test raises the limit
		}
		return len(h.Points)
	}
	r.gate.Hold(curvePoints, 1)
	body := fmt.Sprintf(`{"task": %q, "run": "reading-ui"}`, shortTask(t))
	resp, err := http.Post(r.sidecar+"/jobs", "application/json", strings.NewReader(body))
	require.NoError(t, err)
	err = json.NewDecoder(resp.Body).Decode(&job)
	require.Falsef(t, err != nil || resp.StatusCode != http.StatusCreated, "submit the search: %d %v", resp.StatusCode, err)
	resp.Body.Close()
	submitted.Done()

	alloc, cancelAlloc := chromedp.NewExecAllocator(context.Background(), append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(chrome), chromedp.NoSandbox, chromedp.WindowSize(1280, 900))...)
	defer cancelAlloc()
	tab, cancelTab := chromedp.NewContext(alloc)
	defer cancelTab()
	// The first action starts the browser and lives as long as its context:
	// no timeout on that one.
	require.NoError(t, chromedp.Do(tab))
	ctx, cancel := context.WithTimeout(tab, 4*time.Minute)
	defer cancel()

	// The browser sends the admin key as the Basic password, as a person
	// typing it into the browser's prompt would.
	basicAuth := "Basic " + basicToken("operator", uiAdminKey)
	if err := chromedp.Do(ctx,
		chromedp.Func(func(ctx context.Context, tg *chromedp.Target) error {
			if _, err := cdp.Call(ctx, tg, network.Enable, network.EnableParams{}); err != nil {
				return err
			}
			_, err := cdp.Call(ctx, tg, network.SetExtraHTTPHeaders, network.SetExtraHTTPHeadersParams{Headers: network.Headers{"Authorization": basicAuth}})
			return err
		}),
		chromedp.Navigate(r.url+"/ui"), chromedp.WaitVisible(chromedp.CSS(`main[data-digest]`))); err != nil {
		require.NoError(t, err)
	}

	// Marks of this load: a reload would drop the window's property, and a
	// body swapped in by the page's script is another main element.
	_, err = chromedp.Run(ctx, chromedp.Evaluate[bool](`(window.stintLoad = {main: document.querySelector("main")}, true)`))
	require.NoError(t, err)

	// Live: a request made after the page loaded shows up without a reload.
	before, err := chromedp.Run(ctx, chromedp.Evaluate[map[string]figure](readFigures))
	require.NoError(t, err)
	loaded, _ := strconv.Atoi(before["requests-total"].Value)
	r.call(t, uiKilnKey, quillBody("kiln fires on thursday"))
	if err := chromedp.Do(ctx, voidOf(chromedp.Poll[bool](fmt.Sprintf(
		`Number(document.querySelector('[data-figure="requests-total"]').getAttribute("data-value")) > %d`, loaded)))); err != nil {
		require.NoError(t, err, "the page never showed the new request")
	}

	// Live: the search's curve grows on the page while the search runs.
	// The gate holds the search at one point, then at two: the page must
	// show each while the sidecar still runs the search, then the search
	// is let run to its end.
	sel := func(f string) string { return fmt.Sprintf(`[data-figure="%s-%s"]`, f, job.ID) }
	type searchShown struct {
		Points int    `json:"points"`
		State  string `json:"state"`
	}
	readSearch := fmt.Sprintf(`(() => { const c = document.querySelector('%s'), s = document.querySelector('%s');
  return c === null || s === null ? {points: -1, state: ""} : {points: Number(c.getAttribute("data-value")), state: s.getAttribute("data-value")}; })()`,
		sel("curve-points"), sel("search-state"))
	awaitPoints := func(n int) searchShown {
		t.Helper()
		if err := chromedp.Do(ctx, voidOf(chromedp.Poll[bool](fmt.Sprintf(`(%s).points >= %d`, readSearch, n),
			chromedp.WithPollingTimeout(2*time.Minute)))); err != nil {
			st, _ := r.jobs.Get(job.ID)
			require.NoErrorf(t, err, "the page never showed %d curve points (sidecar says %+v)", n, st)
		}
		shown, err := chromedp.Run(ctx, chromedp.Evaluate[searchShown](readSearch))
		require.NoError(t, err)
		return shown
	}
	first := awaitPoints(1)
	r.gate.Hold(curvePoints, first.Points+1)
	second := awaitPoints(first.Points + 1)
	st, _ := r.jobs.Get(job.ID)
	require.Falsef(t, first.State != string(jobs.Running) || second.State != string(jobs.Running) || second.Points <= first.Points || st.State != jobs.Running, "page showed %+v, then %+v (sidecar now %s); want the curve grown on the page while the search runs", first, second, st.State)
	r.gate.Hold(nil, -1)
	if err := chromedp.Do(ctx, voidOf(chromedp.Poll[bool](fmt.Sprintf(`(%s).state === "done"`, readSearch),
		chromedp.WithPollingTimeout(3*time.Minute)))); err != nil {
		st, _ := r.jobs.Get(job.ID)
		require.NoErrorf(t, err, "the page never showed the search done (sidecar says %+v)", st)
	}
	reloaded, err := chromedp.Run(ctx, chromedp.Evaluate[string](`window.stintLoad === undefined ? "reloaded" : window.stintLoad.main === document.querySelector("main") ? "never swapped" : "swapped"`))
	require.NoError(t, err)
	require.Equal(t, "swapped", reloaded, "page %s; want the first load still open with fresh bodies swapped in by its script", reloaded)
	require.NoError(t, r.proxy.Flush(ctx))
	// Settled: wait until the page shows the current snapshot.
	var snap struct {
		Digest string `json:"digest"`
	}
	for {
		getJSON(t, r.url+"/ui/snapshot.json", "Bearer "+uiAdminKey, &snap)
		if err := chromedp.Do(ctx, voidOf(chromedp.Poll[bool](fmt.Sprintf(`document.querySelector("main").getAttribute("data-digest") === %q`, snap.Digest),
			chromedp.WithPollingTimeout(5*time.Second)))); err == nil {
			break
		} else {
			require.ErrorIs(t, err, chromedp.ErrPollingTimeout)
		}
		shown, _ := chromedp.Run(ctx, chromedp.AttributeValue(chromedp.CSS("main"), "data-digest"))
		t.Logf("page shows digest %s, snapshot %s: waiting", shown.Value, snap.Digest)
	}
	figs, err := chromedp.Run(ctx, chromedp.Evaluate[map[string]figure](readFigures))
	require.NoError(t, err)
	fig := func(name string) figure {
		t.Helper()
		f, ok := figs[name]
		assert.Truef(t, ok, "the page shows no figure %q", name)
		return f
	}

	t.Run("cache outcomes match /metrics", func(t *testing.T) {
		fams := r.scrape(t)
		byOutcome := map[string]int64{}
		var total int64
		for _, m := range fams["stint_requests_total"].GetMetric() {
			n := int64(m.GetCounter().GetValue())
			byOutcome[labelOf(m, "cache")] += n
			total += n
		}
		for _, o := range []string{"hit", "miss", "shared", "partial", "bypass"} {
			got := fig("outcome-" + o)
			assert.Falsef(t, got.Value != strconv.FormatInt(byOutcome[o], 10) || got.Text != got.Value || byOutcome[o] == 0, "outcome %s: page %+v, /metrics %d (each outcome was made at least once)", o, got, byOutcome[o])
		}
		got := fig("requests-total")
		assert.Equal(t, strconv.FormatInt(total, 10), got.Value, "requests: page %+v, /metrics %d", got, total)
	})

	t.Run("upstreams match /metrics", func(t *testing.T) {
		fams := r.scrape(t)
		calls, failed := map[string]int64{}, map[string]int64{}
		for _, m := range fams["stint_upstream_calls_total"].GetMetric() {
			n := int64(m.GetCounter().GetValue())
			calls[labelOf(m, "upstream")] += n
			if labelOf(m, "status") != "200" {
				failed[labelOf(m, "upstream")] += n
			}
		}
		assert.Falsef(t, failed["quill"] == 0, "/metrics counts no failed call on quill: %v", failed)
		type hist struct {
			count  uint64
			sum    float64
			bounds map[float64]uint64
		}
		hists := map[string]*hist{}
		for _, m := range fams["stint_upstream_seconds"].GetMetric() {
			u := labelOf(m, "upstream")
			if hists[u] == nil {
				hists[u] = &hist{bounds: map[float64]uint64{}}
			}
			h := m.GetHistogram()
			hists[u].count += h.GetSampleCount()
			hists[u].sum += h.GetSampleSum()
			for _, b := range h.GetBucket() {
				hists[u].bounds[b.GetUpperBound()] += b.GetCumulativeCount()
			}
		}
		for _, u := range []string{"quill", "local"} {
			got := fig("upstream-calls-" + u)
			assert.Falsef(t, got.Value != strconv.FormatInt(calls[u], 10) || calls[u] == 0, "%s calls: page %+v, /metrics %d", u, got, calls[u])
			got = fig("upstream-failed-" + u)
			assert.Equal(t, strconv.FormatInt(failed[u], 10), got.Value, "%s failed calls: page %+v, /metrics %d", u, got, failed[u])
			h := hists[u]
			if !assert.Falsef(t, h == nil || h.count == 0, "%s: no latency in /metrics", u) {
				continue
			}
			mean, err := strconv.ParseFloat(fig("upstream-mean-"+u).Value, 64)
			want := h.sum / float64(h.count)
			assert.Falsef(t, err != nil || math.Abs(mean-want) > 1e-9*want, "%s mean latency: page %v (%v), /metrics sum/count %v", u, mean, err, want)
			// The p95 lies in the bucket holding the 95th percentile's rank.
			p95, err := strconv.ParseFloat(fig("upstream-p95-"+u).Value, 64)
			lo, hi := bucketOfRank(h.bounds, 0.95*float64(h.count))
			assert.Falsef(t, err != nil || p95 < lo || p95 > hi, "%s p95: page %v (%v), want within its bucket [%v, %v]", u, p95, err, lo, hi)
			text := fig("upstream-p95-" + u).Text
			assert.Truef(t, strings.HasSuffix(text, "s"), "%s p95 shown as %q, want a unit", u, text)
		}
		// The gauge's values are the proxy's (0 closed, 1 half-open, 2
		// open); quill tripped in the traffic and stays open for an hour,
		// local never failed.
		states := map[string]float64{}
		for _, m := range fams["stint_upstream_breaker_state"].GetMetric() {
			states[labelOf(m, "upstream")] = m.GetGauge().GetValue()
		}
		// A counter series exists once an upstream has tripped; the page
		// shows no count for one without.
		trips, tripsShown := map[string]int64{}, map[string]string{}
		for _, m := range fams["stint_upstream_breaker_trips_total"].GetMetric() {
			trips[labelOf(m, "upstream")] += int64(m.GetCounter().GetValue())
			tripsShown[labelOf(m, "upstream")] = strconv.FormatInt(trips[labelOf(m, "upstream")], 10)
		}
		for _, tt := range []struct {
			upstream string
			gauge    float64
			shown    string
			trips    int64
		}{{"quill", 2, "open", 1}, {"local", 0, "closed", 0}} {
			g, ok := states[tt.upstream]
			assert.Truef(t, ok, "%s: no /metrics stint_upstream_breaker_state", tt.upstream)
			assert.Equalf(t, tt.gauge, g, "%s: /metrics stint_upstream_breaker_state", tt.upstream)
			got := fig("breaker-" + tt.upstream)
			assert.Falsef(t, got.Value != tt.shown || got.Text != tt.shown, "%s breaker: page %+v, /metrics %v; want %s", tt.upstream, got, g, tt.shown)
			assert.Equal(t, tt.trips, trips[tt.upstream], "%s: /metrics counts %d breaker trips, want %d", tt.upstream, trips[tt.upstream], tt.trips)
			got = fig("breaker-trips-" + tt.upstream)
			assert.Equal(t, tripsShown[tt.upstream], got.Value, "%s breaker trips: page %+v, /metrics %q", tt.upstream, got, tripsShown[tt.upstream])
		}
	})

	t.Run("spend matches stint statement", func(t *testing.T) {
		t.Setenv(adminKeyEnv, uiAdminKey)
		out, err := runCLI(t, "statement", "--proxy", r.url, "--json")
		require.NoError(t, err, "stint statement: %v\n%s", err, out)
		var rep statement
		require.NoError(t, json.Unmarshal([]byte(out), &rep))
		got := fig("saved-usd")
		assert.Falsef(t, got.Value != rep.Total.SavedUSD || got.Text != "$"+rep.Total.SavedUSD || rep.Total.SavedUSD == "0.00", "saved: page %+v, stint statement %s", got, rep.Total.SavedUSD)
		got = fig("spent-usd")
		assert.Falsef(t, got.Value != rep.Total.SpentUSD || rep.Total.SpentUSD == "0.00", "spent: page %+v, stint statement %s", got, rep.Total.SpentUSD)
		for _, row := range rep.Rows {
			got := fig("team-spent-" + row.Group)
			assert.Equal(t, row.SpentUSD, got.Value, "team %s spent: page %+v, stint statement %s", row.Group, got, row.SpentUSD)
			got = fig("team-saved-" + row.Group)
			assert.Equal(t, row.SavedUSD, got.Value, "team %s saved: page %+v, stint statement %s", row.Group, got, row.SavedUSD)
			got = fig("team-requests-" + row.Group)
			assert.Equal(t, strconv.FormatInt(row.Requests, 10), got.Value, "team %s requests: page %+v, stint statement %d", row.Group, got, row.Requests)
		}
		require.Len(t, rep.Budgets, 2, "budgets, want lab's and kiln's")
		for _, b := range rep.Budgets {
			for name, want := range map[string]string{"spent": b.SpentUSD, "limit": b.LimitUSD, "left": b.LeftUSD} {
				got := fig("budget-" + name + "-" + b.Team)
				assert.Falsef(t, got.Value != want || got.Text != "$"+want, "%s budget %s: page %+v, stint statement %s", b.Team, name, got, want)
			}
		}
		_, ok := figs["budget-limit-quarry"]
		assert.False(t, ok, "quarry has no budget but the page shows one")
	})

	t.Run("runs match the run API", func(t *testing.T) {
		var list proxy.RunList
		getJSON(t, r.url+proxy.RunsPrefix, "Bearer "+uiLabKey, &list)
		seen := map[string]bool{}
		for _, run := range list.Runs {
			seen[run.Run] = true
			id := "lab/" + run.Run
			got := fig("run-calls-" + id)
			assert.Equal(t, strconv.FormatInt(run.Calls, 10), got.Value, "run %s calls: page %+v, API %d", run.Run, got, run.Calls)
			got = fig("run-upstream-" + id)
			assert.Equal(t, strconv.FormatInt(run.UpstreamCalls, 10), got.Value, "run %s upstream calls: page %+v, API %d", run.Run, got, run.UpstreamCalls)
			share, err := strconv.ParseFloat(fig("run-share-"+id).Value, 64)
			assert.Falsef(t, err != nil || math.Abs(share-run.CacheShare) > 1e-12, "run %s cache share: page %v, API %v", run.Run, share, run.CacheShare)
		}
		require.Falsef(t, !seen["pear-tune"] || !seen["reading-ui"], "runs %+v, want pear-tune and reading-ui", list.Runs)
		got := fig("run-share-lab/pear-tune")
		assert.Falsef(t, got.Value != "0.5" || got.Text != "50.0%", "pear-tune: %+v, want half its 2 calls from the cache", got)
	})

	t.Run("searches match the sidecar", func(t *testing.T) {
		var st jobs.Status
		getJSON(t, r.sidecar+"/jobs/"+job.ID, "", &st)
		var hist jobs.History
		getJSON(t, r.sidecar+"/jobs/"+job.ID+"/history", "", &hist)
		require.Falsef(t, st.State != jobs.Done || len(hist.Points) != st.Steps || st.Steps == 0, "sidecar: %+v, %d points", st, len(hist.Points))
		got := fig("search-step-" + job.ID)
		assert.Equal(t, strconv.Itoa(st.Step), got.Value, "step: page %+v, sidecar %d", got, st.Step)
		got = fig("curve-points-" + job.ID)
		assert.Equal(t, strconv.Itoa(len(hist.Points)), got.Value, "curve: page %+v points, sidecar history %d", got, len(hist.Points))
		got = fig("sidecar")
		assert.Equal(t, "ok", got.Value, "sidecar: %+v", got)
		polyline, err := chromedp.Run(ctx, chromedp.Evaluate[int](fmt.Sprintf(
			`document.querySelector('[data-search="%s"] polyline.train').getAttribute("points").trim().split(/\s+/).length`, job.ID)))
		require.NoError(t, err)
		assert.Equal(t, max(len(hist.Points), 2), polyline, "the drawn curve has %d points, the history %d", polyline, len(hist.Points))
	})

	t.Run("no key on the page", func(t *testing.T) {
		html, err := chromedp.Run(ctx, chromedp.OuterHTML(chromedp.CSS("html")))
		require.NoError(t, err)
		var raw json.RawMessage
		getJSON(t, r.url+"/ui/snapshot.json", "Bearer "+uiAdminKey, &raw)
		for _, k := range []string{uiAdminKey, uiLabKey, uiKilnKey, uiUpKey, keyHash(uiAdminKey), keyHash(uiLabKey)} {
			assert.Falsef(t, strings.Contains(html, k) || strings.Contains(string(raw), k), "a key (%.10s…) is on the page or in the snapshot", k)
		}
	})

	dir := artifactDir(t)
	for _, scheme := range []string{"light", "dark"} {
		media := chromedp.Func(func(ctx context.Context, tg *chromedp.Target) error {
			_, err := cdp.Call(ctx, tg, emulation.SetEmulatedMedia, emulation.SetEmulatedMediaParams{
				Features: []*emulation.MediaFeature{{Name: "prefers-color-scheme", Value: scheme}}})
			return err
		})
		require.NoError(t, chromedp.Do(ctx, media, voidOf(chromedp.Poll[bool](fmt.Sprintf(`matchMedia("(prefers-color-scheme: %s)").matches`, scheme)))))
		png, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
		require.NoError(t, err)
		path := filepath.Join(dir, "operator-page-"+scheme+".png")
		require.NoError(t, os.WriteFile(path, png, 0o644))
		t.Logf("screenshot: %s", path)
	}
}

// bucketOfRank returns the bounds of the histogram bucket holding rank.
func bucketOfRank(cum map[float64]uint64, rank float64) (lo, hi float64) {
	bounds := make([]float64, 0, len(cum))
	for b := range cum {
		bounds = append(bounds, b)
	}
	slices.Sort(bounds)
	lo = 0
	for _, b := range bounds {
		if float64(cum[b]) >= rank {
			if math.IsInf(b, 1) {
				return lo, lo
			}
			return lo, b
		}
		lo = b
	}
	return lo, lo
}

// basicToken is the credentials of HTTP Basic authentication (RFC 7617).
func basicToken(user, pass string) string {
	return base64.StdEncoding.EncodeToString([]byte(user + ":" + pass))
}

// voidOf drops an action's value.
func voidOf[T any](a chromedp.Action[T]) chromedp.Action[chromedp.Void] {
	return func(ctx context.Context, t *chromedp.Target) (chromedp.Void, error) {
		_, err := a(ctx, t)
		return chromedp.Void{}, err
	}
}
