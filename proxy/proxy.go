package proxy

import (
	"context"
	"crypto/sha256"
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
	"github.com/sony/gobreaker/v2"

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

	p.mux = p.routes(opts)
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

// route picks the upstream for model.
func (p *Proxy) route(model string) *Upstream {
	for i := range p.upstreams {
		if p.upstreams[i].matches(model) {
			return &p.upstreams[i]
		}
	}
	return nil
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
