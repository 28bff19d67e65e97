package proxy

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/sony/gobreaker/v2"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/coalesce"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy/scrub"
)

// HeaderCachedPrompt, on the answer to a completions prompt array, is
// "hits/prompts": how many of its prompts came from the cache.
const HeaderCachedPrompt = "Stint-Cached-Prompts"

// Cache outcomes as the metrics, request logs and run journals name them;
// answers carry them as Cache-Status (see CacheStatus.Outcome).
const (
	OutcomeHit     = "hit"     // answered from the cache
	OutcomeMiss    = "miss"    // answered by an upstream call this request made
	OutcomeShared  = "shared"  // answered by coalescing onto another request's upstream call
	OutcomePartial = "partial" // a batch with some prompts from the cache, the rest from upstream
	OutcomeBypass  = "bypass"  // not cacheable (sampled, or caching is off): forwarded as is
)

// DefaultGreedyBelow is the default of Options.GreedyBelow.
const DefaultGreedyBelow = 1e-6

// DefaultMaxPrompts is the default of Options.MaxPrompts.
const DefaultMaxPrompts = 2048

// DefaultMaxBodyBytes bounds a request body unless Options says otherwise.
const DefaultMaxBodyBytes = 4 << 20

// maxUpstreamBody bounds an upstream answer the proxy reads whole.
const maxUpstreamBody = 256 << 20

// Options configure a Proxy. Zero values mean the documented default.
type Options struct {
	// Store holds cached answers. Required.
	Store cache.Store
	// Upstreams receive misses; a request goes to the first whose Models match.
	// At least one is required.
	Upstreams []Upstream
	// Secrets are credentials to mask in upstream answers (headers and
	// bodies, before a client, a log or a store sees them) besides the
	// upstreams' own Keys, which always are: see package scrub.
	Secrets []string
	// Teams are the clients allowed in. Empty means open mode: every request
	// belongs to one team named "default" and no key is needed.
	Teams []Team
	// MaxBodyBytes bounds a request body; zero means DefaultMaxBodyBytes.
	MaxBodyBytes int64
	// MaxPrompts bounds the prompts of one completions request (an array
	// prompt's items); a request with more gets 400 too_many_prompts
	// before any of them is looked at. Zero means DefaultMaxPrompts, -1
	// no cap.
	MaxPrompts int
	// MaxInFlight caps each team's requests in flight on this proxy
	// (Team.MaxInFlight overrides it per team); a request over it gets 429
	// with Retry-After before its body is read. Zero means no cap.
	MaxInFlight int
	// WriteTimeout, when set, is the server's write timeout (the
	// http.Server's WriteTimeout should be the same): the connection's
	// write deadline is moved this far ahead before every write, so it
	// bounds each write rather than the whole answer. Zero leaves
	// deadlines to the server.
	WriteTimeout time.Duration
	// CacheTTL is how long an answer stays cached; zero means until evicted.
	CacheTTL time.Duration
	// CacheSampled also caches sampled requests (temperature > 0 or n > 1),
	// freezing the first sample. Off by default.
	CacheSampled bool
	// GreedyBelow is the temperature at or below which a request counts as
	// greedy (deterministic) and is cached. Zero means DefaultGreedyBelow;
	// -1 means only an exact 0. Some client libraries cannot send a zero
	// temperature and send the smallest float instead.
	GreedyBelow float64
	// UncachedModels are forwarded without caching.
	UncachedModels []string
	// ModelsTTL is how long a /v1/models answer is reused; zero means a minute,
	// -1 means not at all.
	ModelsTTL time.Duration
	// Logger receives one line per request; nil discards.
	Logger *slog.Logger
	// LogPrompts adds prompt text to request log lines (debugging only).
	LogPrompts bool
	// RequestLog, when set, receives the one-line-per-request log as JSON
	// objects (the shape slog's JSON handler writes) instead of Logger:
	// a faster path for the line written on every request. Logger still
	// gets everything else.
	RequestLog io.Writer
	// Registerer receives the proxy's metrics; nil registers none.
	Registerer prometheus.Registerer
	// Gatherer serves /metrics; nil serves no metrics endpoint.
	Gatherer prometheus.Gatherer
	// Metrics says who may read /metrics; the zero value lets anyone.
	Metrics MetricsAccess
	// Now is the clock; nil means time.Now.
	Now func() time.Time
	// Spend admits and accounts upstream calls (budgets, rate limits,
	// prices); nil means no spend control.
	Spend SpendControl
	// Runs journals calls that carry a Stint-Run header and answers
	// replays from it; nil turns record/replay off.
	Runs runs.Journal
	// RunImport holds the limits of POST /stint/runs/import (MaxBytes,
	// MaxBodyBytes, MaxMembers, MaxEntries; zero: the runs package's
	// defaults); As and Replace come from each request.
	RunImport runs.ImportOptions
	// AdminKeyHashes are SHA-256 digests of the keys that may use the
	// admin endpoints (AdminPrefix); empty turns them off, except in open
	// mode (no Teams), where they answer anyone like every endpoint.
	AdminKeyHashes [][sha256.Size]byte
	UI             UIOptions // the operator page at /ui (ui.go); on with admin keys
	// SharedFlights, when set, coalesces misses across replicas sharing
	// Store: a cacheable miss of one prompt first claims the key, the
	// holder fetches and stores the answer before it releases, and the
	// other replicas then answer from the store (Cache-Status: collapsed).
	// nil coalesces only within this process.
	SharedFlights SharedFlights
	// BreakerStore shares the upstreams' circuit breaker state between
	// replicas (proxy/breaker/redisstate); nil keeps it in the process.
	BreakerStore gobreaker.SharedDataStore
	// Sleep waits before a retry and must return early with ctx's error
	// when ctx ends; nil waits on a timer (tests pass one that records).
	Sleep func(ctx context.Context, d time.Duration) error
	// Rand is the source of retry jitter; nil seeds one at random.
	Rand rand.Source
	// StoreBeforeAnswer releases the answer of a cacheable miss only after its
	// entry is stored: Store.Put has returned (on the embedded store, the
	// commit is fsynced; concurrent misses share commits), and a streamed
	// miss is relayed as it comes but its final "data: [DONE]" event waits
	// for the store. A Put that fails still releases the answer, marked
	// Cache-Status detail=store-unavailable. Off, answers are stored right after
	// they are sent (see writeBehind), which a crash can lose.
	StoreBeforeAnswer bool
}

// Proxy is the caching proxy. It is an http.Handler; create it with New.
type Proxy struct {
	store          cache.Store
	upstreams      []Upstream
	teams          []Team
	open           *Team
	maxBody        int64
	maxPrompts     int // < 1: no cap
	ttl            time.Duration
	cacheSampled   bool
	greedyBelow    float64
	uncachedModels map[string]bool
	modelsTTL      time.Duration
	log            *slog.Logger
	logPrompts     bool
	requestLog     *requestLog
	metrics        *metrics
	now            func() time.Time
	mux            *http.ServeMux
	inFlight       map[string]*inFlight // per team
	scrub          *scrub.Scrubber      // upstream credentials; nil: none
	writeTimeout   time.Duration

	flights           coalesce.Group[*flightResult]
	writes            *writeBehind
	memo              *requestMemo
	spend             SpendControl
	adminKeys         [][sha256.Size]byte
	runs              runs.Journal
	runImport         runs.ImportOptions // limits of an import
	resil             *resilience
	cursor            runs.Cursor // replay positions
	storeBeforeAnswer bool        // Options.StoreBeforeAnswer
	left              leftCache
	tasks             *background // journal writes for savings

	draining atomic.Bool

	// shared coalesces misses across replicas (nil: off); remoteWaiting
	// counts requests in its Claim.
	shared        SharedFlights
	remoteWaiting atomic.Int64

	modelsMu      sync.Mutex // guards modelsBody, modelsCode, modelsMissing, modelsAt
	modelsBody    []byte
	modelsCode    int
	modelsMissing []string
	modelsAt      time.Time
}

// New builds a Proxy from opts.
func New(opts Options) (*Proxy, error) {
	if opts.Store == nil {
		return nil, errors.New("proxy: Options.Store is required")
	}
	if len(opts.Upstreams) == 0 {
		return nil, errors.New("proxy: at least one upstream is required")
	}
	p := &Proxy{
		store:          opts.Store,
		upstreams:      make([]Upstream, len(opts.Upstreams)),
		teams:          append([]Team(nil), opts.Teams...),
		maxBody:        opts.MaxBodyBytes,
		ttl:            opts.CacheTTL,
		cacheSampled:   opts.CacheSampled,
		greedyBelow:    opts.GreedyBelow,
		uncachedModels: map[string]bool{},
		modelsTTL:      opts.ModelsTTL,
		log:            opts.Logger,
		logPrompts:     opts.LogPrompts,
		now:            opts.Now,
	}
	p.writes = newWriteBehind(opts.Store)
	p.memo = newRequestMemo()
	p.spend = opts.Spend
	p.adminKeys = opts.AdminKeyHashes
	p.runs = opts.Runs
	p.runImport = runs.ImportOptions{MaxBytes: opts.RunImport.MaxBytes, MaxBodyBytes: opts.RunImport.MaxBodyBytes,
		MaxMembers: opts.RunImport.MaxMembers, MaxEntries: opts.RunImport.MaxEntries}
	p.shared = opts.SharedFlights
	p.storeBeforeAnswer = opts.StoreBeforeAnswer
	p.tasks = newBackground(maxPendingWrites)
	copy(p.upstreams, opts.Upstreams)
	for i := range p.upstreams {
		if p.upstreams[i].Name == "" {
			p.upstreams[i].Name = fmt.Sprintf("upstream-%d", i)
		}
		if p.upstreams[i].Client == nil {
			p.upstreams[i].Client = NewUpstreamClient()
		}
	}
	if len(p.teams) == 0 {
		p.open = &Team{Name: "default"}
	}
	if p.maxBody <= 0 {
		p.maxBody = DefaultMaxBodyBytes
	}
	p.inFlight = newInFlight(p.teams, p.open, opts.MaxInFlight)
	p.maxPrompts = opts.MaxPrompts
	if p.maxPrompts == 0 {
		p.maxPrompts = DefaultMaxPrompts
	}
	p.writeTimeout = opts.WriteTimeout
	switch {
	case p.greedyBelow == 0:
		p.greedyBelow = DefaultGreedyBelow
	case p.greedyBelow < 0:
		p.greedyBelow = 0
	}
	if p.modelsTTL == 0 {
		p.modelsTTL = time.Minute
	}
	for _, m := range opts.UncachedModels {
		p.uncachedModels[m] = true
	}
	if p.log == nil {
		p.log = slog.New(slog.DiscardHandler)
	}
	if opts.RequestLog != nil {
		p.requestLog = newRequestLog(opts.RequestLog)
	}
	if p.now == nil {
		p.now = time.Now
	}
	secrets := append([]string(nil), opts.Secrets...)
	for _, u := range p.upstreams {
		secrets = append(secrets, u.Key)
	}
	var short []string
	p.scrub, short = scrub.New(secrets)
	if len(short) > 0 {
		p.log.Warn("an upstream credential is too short to be told apart from ordinary text, so answers are not scrubbed of it", "keys", len(short), "min_bytes", scrub.MinLen)
	}
	m, err := newMetrics(opts.Registerer,
		func() float64 { return float64(p.flights.TotalWaiting()) },
		func() float64 { return float64(p.writes.inFlight()) },
		func() float64 { return float64(p.remoteWaiting.Load()) })
	if err != nil {
		return nil, fmt.Errorf("proxy: register metrics: %w", err)
	}
	p.metrics = m
	if err := p.initUpstreams(opts); err != nil {
		return nil, err
	}

	mux := http.NewServeMux()
	mux.HandleFunc("POST /v1/completions", func(w http.ResponseWriter, r *http.Request) { p.serveGenerate(w, r, endpointCompletions) })
	mux.HandleFunc("POST /v1/chat/completions", func(w http.ResponseWriter, r *http.Request) { p.serveGenerate(w, r, endpointChat) })
	mux.HandleFunc("GET /v1/models", p.serveModels)
	mux.HandleFunc("GET /healthz", p.serveHealth)
	mux.HandleFunc("GET /readyz", p.serveReady)
	p.routeAdmin(mux)
	p.routeRuns(mux)
	p.routeUI(mux, opts)
	if opts.Gatherer != nil && !opts.Metrics.Off {
		mux.HandleFunc("GET /metrics", p.metricsHandler(promhttp.HandlerFor(opts.Gatherer, promhttp.HandlerOpts{}), opts.Metrics))
	}
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		if allow := allowedMethods(mux, r); len(allow) > 0 {
			w.Header().Set("Allow", strings.Join(allow, ", "))
			writeError(w, &apiError{status: http.StatusMethodNotAllowed, typ: errInvalidRequest, code: "method_not_allowed",
				message: fmt.Sprintf("%s is not allowed on %s; use %s", r.Method, r.URL.Path, strings.Join(allow, " or "))})
			return
		}
		writeError(w, &apiError{status: http.StatusNotFound, typ: errInvalidRequest, code: "unknown_url", message: fmt.Sprintf("no route for %s %s", r.Method, r.URL.Path)})
	})
	p.mux = mux
	return p, nil
}

// ServeHTTP implements http.Handler.
func (p *Proxy) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	p.mux.ServeHTTP(withWriteTimeout(w, p.writeTimeout), r)
}

// Close waits until every answer already sent has been written to the store
// (or ctx ends). It does not close the store, which the caller owns.
func (p *Proxy) Close(ctx context.Context) error { return p.Flush(ctx) }

// Flush waits until the work that runs behind answers already sent (store
// writes, journal entries of cache savings) has landed, or ctx ends.
func (p *Proxy) Flush(ctx context.Context) error {
	if err := p.writes.wait(ctx); err != nil {
		return err
	}
	return p.tasks.wait(ctx)
}

// Drain marks the proxy as shutting down: /readyz answers 503 so load
// balancers stop sending new work while in-flight requests finish.
func (p *Proxy) Drain() { p.draining.Store(true) }

func (p *Proxy) serveHealth(w http.ResponseWriter, _ *http.Request) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	_, _ = io.WriteString(w, "ok\n")
}

func (p *Proxy) serveReady(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	if p.draining.Load() {
		w.WriteHeader(http.StatusServiceUnavailable)
		_, _ = io.WriteString(w, "draining\n")
		return
	}
	ctx, cancel := context.WithTimeout(r.Context(), 2*time.Second)
	defer cancel()
	if _, _, err := p.store.Get(ctx, "readyz-probe"); err != nil {
		if p.shared != nil {
			// Every replica shares this store: failing them all would turn
			// a degraded cache into an outage. Answers go on from upstream.
			_, _ = io.WriteString(w, "ready (cache store unavailable)\n")
			return
		}
		w.WriteHeader(http.StatusServiceUnavailable)
		_, _ = io.WriteString(w, "cache store unavailable\n")
		return
	}
	_, _ = io.WriteString(w, "ready\n")
}

// route picks the upstream for model.
func (p *Proxy) route(model string) *Upstream {
	for i := range p.upstreams {
		if p.upstreams[i].matches(model) {
			return &p.upstreams[i]
		}
	}
	return nil
}

// probedMethods are the methods allowedMethods tries, in the order Allow
// lists them.
var probedMethods = [...]string{http.MethodGet, http.MethodHead, http.MethodPost, http.MethodPut, http.MethodPatch, http.MethodDelete}

// allowedMethods lists the methods other than r's that mux routes r's path
// for, other than to its catch-all "/": a known path asked with the wrong
// method gets 405 with them as Allow (RFC 9110 §15.5.6), not 404.
func allowedMethods(mux *http.ServeMux, r *http.Request) []string {
	var allow []string
	for _, m := range probedMethods {
		if m == r.Method {
			continue
		}
		probe := &http.Request{Method: m, URL: r.URL, Host: r.Host, Header: http.Header{}}
		if _, pattern := mux.Handler(probe); pattern != "" && pattern != "/" {
			allow = append(allow, m)
		}
	}
	return allow
}

// notRouted is the error of a model no upstream serves: it names the
// models that are served (every upstream then has a Models list).
func (p *Proxy) notRouted(model string) *apiError {
	var served []string
	for _, u := range p.upstreams {
		served = append(served, u.Models...)
	}
	return &apiError{status: http.StatusBadRequest, typ: errInvalidRequest, code: "model_not_routed", param: "model",
		message: fmt.Sprintf("no upstream serves model %q; this proxy serves %s", model, strings.Join(served, ", "))}
}

// cacheable reports whether req may be answered from and stored in the cache.
func (p *Proxy) cacheable(t *Team, req *request) bool {
	if t.CacheOff || p.uncachedModels[req.model] {
		return false
	}
	if p.cacheSampled {
		return true
	}
	return p.greedy(req) && req.n == 1
}

// greedy reports whether req decodes deterministically.
func (p *Proxy) greedy(req *request) bool { return req.temperature <= p.greedyBelow }

// served is one prompt's answer: a complete single-prompt response body.
type served struct {
	body  []byte
	usage usage
	// facts, when set, are tokenFacts of body, found while decoding it.
	facts *answerFacts
	// storedAt is when a cached answer was stored (Unix seconds).
	storedAt int64
}

// flightResult is what one upstream call yields, shared by coalesced waiters.
type flightResult struct {
	full     []byte   // the upstream's whole answer, assembled when streamed
	items    []served // one per prompt sent
	streamed bool     // the leader already streamed the answer to its client
	doneHeld bool     // ... all of it but its final event (missCall.holdDone)
	// unstorable: the streamed answer was relayed but cannot be rebuilt for
	// storing or for sharing with waiters.
	unstorable bool
	// fromStore: answered from the shared store after another replica's
	// call (see SharedFlights), not by a call of this process.
	fromStore bool
	latency   time.Duration
	cost      budget.Nanos // what the call was charged (spend control on)
}

// logLine gathers what the request's log line reports.
type logLine struct {
	team, model, outcome string
	endpoint             endpoint
	status               int
	upstream             time.Duration
	usage                usage
	prompts, hits        int
	promptText           string
	// storeDown notes that the cache store failed during the request (see
	// storeFailed).
	storeDown bool
	// For Cache-Status: the key of a single-prompt request, when the oldest
	// answer served from the cache was stored (Unix seconds), whether the
	// request said no-cache, and whether the upstream's answer is stored.
	key      string
	storedAt int64
	noCache  bool
	stored   bool
}

func (p *Proxy) serveGenerate(w http.ResponseWriter, r *http.Request, ep endpoint) {
	start := p.now()
	ll := &logLine{endpoint: ep}
	defer func() { p.finish(ll, start) }()
	fail := func(e *apiError) {
		ll.status = e.status
		if ll.outcome == "" {
			ll.outcome = "error"
		}
		writeError(w, e)
	}

	team, keyID, release, aerr := p.admit(w, r)
	if aerr != nil {
		ll.status, ll.outcome = aerr.status, "error"
		return
	}
	defer release()
	ll.team = team.Name
	body, aerr := p.readBody(w, r)
	if aerr != nil {
		fail(aerr)
		return
	}
	rc, aerr := runHeaders(r.Header)
	if aerr != nil {
		fail(aerr)
		return
	}
	if rc.id != "" {
		if p.runs == nil {
			fail(runsOff())
			return
		}
		if rc.replay {
			if aerr := p.serveReplay(w, r, ll, team, rc, ep, body); aerr != nil {
				fail(aerr)
			}
			return
		}
		// A team whose runs are at their quota cannot record: refused
		// before anything is paid for. (A call that fits now but whose
		// answer does not is refused when it is journaled.)
		if u, err := p.runs.Usage(r.Context(), team.Name); err != nil {
			fail(journalError(err))
			return
		} else if u.QuotaBytes > 0 && u.Bytes >= u.QuotaBytes {
			fail(quotaError(&runs.QuotaError{Team: team.Name, Used: u.Bytes, Quota: u.QuotaBytes}))
			return
		}
		r = r.WithContext(withRun(r.Context(), rc.id)) // spend entries name the run
		rr := &runRecorder{w: w}
		w = rr // fail and every answer below write through the recorder
		defer rr.finish(func(a runs.Answer) error { return p.recordCall(r.Context(), team, rc, ep, body, rr.Header(), a) })
	}
	d := parseDirectives(r.Header)
	ll.noCache = d.noCache
	mk := memoKey(team, ep, body)
	if m, ok := p.memo.get(mk); ok && !d.noCache && !p.logPrompts {
		// Seen these exact bytes before: go straight to the cache.
		if hit, _ := p.lookup(r.Context(), ll, &m.req, m.key, p.greedy(&m.req)); hit != nil {
			ll.model, ll.prompts, ll.hits, ll.outcome = m.req.model, 1, 1, OutcomeHit
			ll.key, ll.storedAt = m.key, hit.storedAt
			p.metrics.series(team.Name, string(ep), OutcomeHit).hitPrompts.Inc()
			fig := spendFigures{team: team.Name, saved: p.noteSaved(r.Context(), team, keyID, &m.req, hit.usage)}
			p.answer(w, ll, &m.req, []item{{key: m.key, hit: hit}}, nil, OutcomeHit, fig)
			return
		}
	}
	req, aerr := parseRequest(ep, body, p.maxPrompts)
	if aerr != nil {
		fail(aerr)
		return
	}
	ll.model = req.model
	if p.logPrompts {
		ll.promptText = promptText(req)
	}
	up := p.route(req.model)
	if up == nil {
		fail(p.notRouted(req.model))
		return
	}
	if e := req.checkLogprobs(up.maxLogprobs(), up.Name); e != nil {
		fail(e)
		return
	}
	if !p.cacheable(team, req) {
		if d.onlyIfCached {
			fail(notCached())
			return
		}
		ll.outcome = OutcomeBypass
		p.forward(w, r, ll, team, keyID, up, req)
		return
	}
	p.serveCached(w, r, ll, team, keyID, up, req, d, mk, fail)
}

func notCached() *apiError {
	return &apiError{status: http.StatusGatewayTimeout, typ: errCache, code: "not_cached", message: "the answer is not in the cache and the request said only-if-cached"}
}

// item is one prompt of a request and its cache state.
type item struct {
	prompt json.RawMessage // nil for chat
	key    string
	hit    *served
	// looked: the store was asked for key; stored is the record it held (nil
	// for none), reused when the answer is stored so the store is read once.
	looked bool
	stored []byte
}

func (p *Proxy) serveCached(w http.ResponseWriter, r *http.Request, ll *logLine, team *Team, keyID string, up *Upstream, req *request, d directives, mk [32]byte, fail func(*apiError)) {
	ctx := r.Context()
	items := make([]item, 1)
	if req.endpoint == endpointCompletions {
		items = make([]item, len(req.prompts))
		for i, pr := range req.prompts {
			items[i].prompt = pr
		}
	}
	greedy := p.greedy(req)
	var misses []int
	for i := range items {
		k, err := itemKey(team, up, req, items[i].prompt)
		if err != nil {
			fail(badRequest("", "request cannot be canonicalized: %v", err))
			return
		}
		items[i].key = k
		if len(items) == 1 && !req.promptsArray {
			p.memo.remember(mk, req, k)
		}
		if !d.noCache {
			items[i].hit, items[i].stored = p.lookup(ctx, ll, req, k, greedy)
			items[i].looked = true
		}
		if items[i].hit == nil {
			misses = append(misses, i)
		}
	}
	ll.prompts, ll.hits = len(items), len(items)-len(misses)
	if len(items) == 1 {
		ll.key = items[0].key
	}
	ll.storedAt = oldestStored(items)
	p.metrics.prompts.WithLabelValues(team.Name, "hit").Add(float64(ll.hits))
	p.metrics.prompts.WithLabelValues(team.Name, "miss").Add(float64(len(misses)))

	if len(misses) == 0 {
		ll.outcome = OutcomeHit
		fig := spendFigures{team: team.Name, saved: p.noteSaved(ctx, team, keyID, req, itemsUsage(items, nil))}
		p.answer(w, ll, req, items, nil, OutcomeHit, fig)
		return
	}
	if d.onlyIfCached {
		fail(notCached())
		return
	}

	flightKey := flightKeyFor(items, misses, req)
	var leaderStreamed bool
	res, shared, err := p.flights.Do(ctx, flightKey, func() (*flightResult, error) {
		// One client's disconnect must not cancel a call others may share.
		cctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), up.timeout())
		defer cancel()
		holding := false
		if p.shared != nil && len(misses) == 1 && !d.noCache && !d.noStore {
			res, release := p.claimShared(cctx, ll, req, &items[misses[0]], greedy)
			if res != nil {
				return res, nil
			}
			if release != nil {
				holding = true
				defer func() {
					if err := release(cctx); err != nil {
						p.log.Warn("cannot release a shared lease; it expires by itself", "err", err)
					}
				}()
			}
		}
		streamTo := http.ResponseWriter(nil)
		if req.stream && len(misses) == len(items) {
			streamTo = w
		}
		storing := !d.noStore
		// A relayed stream's headers go out before it is known whether
		// its answer can be stored: they do not say stored.
		streamStatus := p.cacheStatusOf(ll, OutcomeMiss, http.StatusOK).String()
		res, err := p.fetch(ctx, cctx, missCall{team, keyID, up, req, items, misses, storing && p.storeBeforeAnswer, streamStatus}, streamTo)
		if res != nil && res.streamed {
			leaderStreamed = true
		}
		if leaderStreamed && err == nil {
			p.spendHeaders(cctx, w.Header(), team.Name, res.cost, 0)
		}
		if err != nil {
			return nil, err
		}
		if storing && !res.unstorable {
			// A lease holder stores before it releases, so the replicas
			// waiting on it find the answer; with StoreBeforeAnswer every answer
			// waits for its entry.
			ll.stored = p.storeItems(cctx, ll, req, items, misses, res.items, greedy, holding || p.storeBeforeAnswer)
		}
		if res.doneHeld {
			writeDone(streamTo)
		}
		return res, nil
	})
	if err != nil {
		var ae *admitError
		if errors.As(err, &ae) {
			fail(spendError(ae.err))
			return
		}
		if leaderStreamed {
			// Headers and part of the stream are out; abort so the client sees a broken stream.
			ll.outcome, ll.status = OutcomeMiss, http.StatusBadGateway
			panic(http.ErrAbortHandler)
		}
		var ue *upstreamError
		if errors.As(err, &ue) {
			ll.outcome = OutcomeMiss
			if shared {
				ll.outcome = OutcomeShared
			}
			p.writeUpstreamError(w, ll, ue)
			return
		}
		if errors.Is(err, context.Canceled) || errors.Is(err, context.DeadlineExceeded) {
			fail(&apiError{status: http.StatusGatewayTimeout, typ: errUpstream, code: "client_gone", message: "the request ended before the answer arrived"})
			return
		}
		fail(&apiError{status: http.StatusBadGateway, typ: errUpstream, code: "bad_upstream_answer", message: err.Error()})
		return
	}
	if res.fromStore {
		shared = true // another replica's call answered it
	}
	if shared {
		ll.stored = false // the call and its store were another request's
	}
	ll.upstream = res.latency
	if res.unstorable && !(leaderStreamed && !shared) {
		fail(&apiError{status: http.StatusBadGateway, typ: errUpstream, code: "not_shareable", message: "an identical streamed call was in flight but its answer could not be shared; retry"})
		return
	}
	outcome := OutcomeMiss
	switch {
	case ll.hits > 0:
		outcome = OutcomePartial
	case shared:
		outcome = OutcomeShared
	}
	ll.outcome = outcome
	if leaderStreamed && !shared {
		ll.status = http.StatusOK
		_, ll.usage = mergeUsage(res.items)
		return
	}
	for j, i := range misses {
		items[i].hit = &res.items[j]
	}
	var full []byte
	if ll.hits == 0 {
		full = res.full
	}
	fig := spendFigures{team: team.Name}
	if shared {
		// Answered by another request's call: all of it was free to this one.
		fig.saved = p.noteSaved(ctx, team, keyID, req, itemsUsage(items, nil))
	} else {
		fig.cost = res.cost
		if ll.hits > 0 {
			fig.saved = p.noteSaved(ctx, team, keyID, req, itemsUsage(items, hitIndexes(items, misses)))
		}
	}
	p.answer(w, ll, req, items, full, outcome, fig)
}

// lookup returns the cached answer for key shaped to req (nil when there is
// none that fits) and the stored record's bytes (nil when there is none).
func (p *Proxy) lookup(ctx context.Context, ll *logLine, req *request, key string, greedy bool) (*served, []byte) {
	b, ok, err := p.writes.get(ctx, key)
	if err != nil {
		// A store that failed may still have served a copy it held (see
		// writeBehind.get): the answer is then served, and says the store
		// is unavailable.
		p.storeFailed(ll, "get", err)
	}
	if !ok {
		return nil, nil
	}
	return p.fromRecord(req, b, greedy)
}

// fromRecord is lookup's answer from the stored record b.
func (p *Proxy) fromRecord(req *request, b []byte, greedy bool) (*served, []byte) {
	rec, err := decodeRecord(b)
	if err != nil {
		p.metrics.storeErrors.WithLabelValues("decode").Inc()
		return nil, nil
	}
	v, ok := rec.pick(req.logprobs, req.maxTokens, greedy, req.stop)
	if !ok {
		return nil, b
	}
	body, u, err := shape(req.endpoint, v, req.logprobs, req.maxTokens)
	if err != nil {
		return nil, b
	}
	return &served{body: body, usage: u, storedAt: v.StoredAt}, b
}

// storeItems records each fetched prompt's answer under its key. The writes
// land behind the answer (see writeBehind), or before storeItems returns
// when sync is set. It reports whether every answer was stored (or queued
// to be).
func (p *Proxy) storeItems(ctx context.Context, ll *logLine, req *request, items []item, misses []int, got []served, greedy, sync bool) bool {
	stored := true
	for j, i := range misses {
		key := items[i].key
		var rec record
		b := items[i].stored
		if !items[i].looked {
			b, _, _ = p.writes.get(ctx, key)
		}
		if b != nil {
			if old, err := decodeRecord(b); err == nil {
				rec = old
			}
		}
		v := variant{
			Logprobs:  req.logprobs,
			MaxTokens: req.maxTokens,
			Usage:     got[j].usage,
			Estimated: len(misses) > 1,
			StoredAt:  nowUnix(p.now()),
			Body:      got[j].body,
		}
		if f := got[j].facts; f != nil {
			v.Finish, v.Tokens = f.finish, f.tokens
		} else {
			v.Finish, v.Tokens = tokenFacts(req, got[j].body)
		}
		b, err := rec.with(v, greedy, req.stop).encode()
		if err != nil {
			p.metrics.storeErrors.WithLabelValues("encode").Inc()
			stored = false
			continue
		}
		if sync {
			if err := p.store.Put(ctx, key, b, p.ttl); err != nil {
				stored = false
				if !errors.Is(err, cache.ErrTooLarge) {
					p.storeFailed(ll, "put", err)
				}
			}
			continue
		}
		p.writes.put(key, b, p.ttl, func(err error) {
			p.metrics.storeErrors.WithLabelValues("put").Inc()
			p.log.Warn("cache put failed; answer served but not stored", "err", err)
		})
	}
	return stored
}

// oldestStored is when the oldest of items' cached answers was stored
// (Unix seconds); 0 when none is cached.
func oldestStored(items []item) int64 {
	var at int64
	for _, it := range items {
		if it.hit != nil && (at == 0 || it.hit.storedAt < at) {
			at = it.hit.storedAt
		}
	}
	return at
}

// itemKey derives the cache key of one prompt of req (prompt is nil for chat).
func itemKey(t *Team, up *Upstream, req *request, prompt json.RawMessage) (string, error) {
	canonical, err := keyBody(req, prompt)
	if err != nil {
		return "", err
	}
	return cache.Key(cache.KeyParts{
		Namespace: t.namespace(),
		Upstream:  up.Name,
		Endpoint:  string(req.endpoint),
		Model:     req.model,
	}, canonical), nil
}

// flightKeyFor identifies an upstream call: the missing prompts' keys and the
// fields that shape the answer but are not in the keys.
func flightKeyFor(items []item, misses []int, req *request) string {
	h := sha256.New()
	for _, i := range misses {
		io.WriteString(h, items[i].key)
		h.Write([]byte{0})
	}
	fmt.Fprintf(h, "lp=%d mt=%d", req.logprobs, req.maxTokens)
	return hex.EncodeToString(h.Sum(nil))
}

func (p *Proxy) readBody(w http.ResponseWriter, r *http.Request) ([]byte, *apiError) {
	body, err := readAllSized(http.MaxBytesReader(w, r.Body, p.maxBody), r.ContentLength, p.maxBody)
	if err != nil {
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			return nil, &apiError{status: http.StatusRequestEntityTooLarge, typ: errInvalidRequest, code: "body_too_large", message: fmt.Sprintf("request body is larger than %d bytes", p.maxBody)}
		}
		if bodyTimedOut(err) {
			w.Header().Set("Connection", "close")
			return nil, &apiError{status: http.StatusRequestTimeout, typ: errInvalidRequest, code: "body_timeout", message: "the request body did not arrive within the server's read timeout"}
		}
		return nil, badRequest("", "cannot read request body: %v", err)
	}
	return body, nil
}

// readAllSized reads r to its end like io.ReadAll, starting from a buffer
// of the announced length (when it is known and within limit) so a body
// is read into one allocation of its own size.
func readAllSized(r io.Reader, announced, limit int64) ([]byte, error) {
	if announced <= 0 || announced > limit {
		return io.ReadAll(r)
	}
	// One byte more than announced, so reaching the end needs no growth.
	b := make([]byte, 0, announced+1)
	for {
		n, err := r.Read(b[len(b):cap(b)])
		b = b[:len(b)+n]
		if err == io.EOF {
			return b, nil
		}
		if err != nil {
			return b, err
		}
		if len(b) == cap(b) {
			b = append(b, 0)[:len(b)] // grow: the body is longer than announced
		}
	}
}

func (p *Proxy) finish(ll *logLine, start time.Time) {
	end := p.now()
	d := end.Sub(start)
	if ll.outcome != "" && ll.outcome != "error" {
		ms := p.metrics.series(ll.team, string(ll.endpoint), ll.outcome)
		ms.requests.Inc()
		ms.seconds.Observe(d.Seconds())
		ms.promptTokens.Add(float64(ll.usage.PromptTokens))
		ms.completionTokens.Add(float64(ll.usage.CompletionTokens))
	}
	if p.requestLog != nil {
		p.requestLog.write(end, ll, d)
		return
	}
	if !p.log.Enabled(context.Background(), slog.LevelInfo) {
		return
	}
	attrs := make([]slog.Attr, 0, 14)
	attrs = append(attrs,
		slog.String("team", ll.team), slog.String("endpoint", string(ll.endpoint)), slog.String("model", ll.model),
		slog.String("cache", ll.outcome), slog.Int("status", ll.status), slog.Int("prompts", ll.prompts), slog.Int("cached_prompts", ll.hits),
		slog.Int("prompt_tokens", ll.usage.PromptTokens), slog.Int("completion_tokens", ll.usage.CompletionTokens),
		slog.Int64("upstream_us", ll.upstream.Microseconds()), slog.Int64("duration_us", d.Microseconds()),
	)
	if ll.promptText != "" {
		attrs = append(attrs, slog.String("prompt", ll.promptText))
	}
	p.log.LogAttrs(context.Background(), slog.LevelInfo, "request", attrs...)
}

func promptText(req *request) string {
	if req.endpoint == endpointChat {
		return string(req.fields["messages"])
	}
	return string(req.fields["prompt"])
}
