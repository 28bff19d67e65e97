package main

import (
	"context"
	"crypto/sha256"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/redis/go-redis/v9"
	"github.com/sony/gobreaker/v2"
	"github.com/spf13/cobra"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/allowance"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/ratelimit/redisrate"
	"github.com/stintlab/stint/budget/redisledger"
	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/boltstore"
	"github.com/stintlab/stint/cache/redisstore"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/breaker/redisstate"
	"github.com/stintlab/stint/proxy/localmodel"
)

// serveFlags are the command-line settings of `stint serve`.
type serveFlags struct {
	listen      string
	upstream    string
	data        string
	config      string
	logFormat   string
	logPrompts  bool
	checkConfig bool
}

func newServeCmd() *cobra.Command {
	var f serveFlags
	cmd := &cobra.Command{
		Use:   "serve",
		Short: "Run the caching proxy in front of an inference API",
		Long: `Run the caching proxy. Point any client of the completions wire format at
http://LISTEN/v1 instead of the paid API: repeated deterministic calls
(temperature 0) are answered from the cache in the data directory.

The upstream credential is read from the environment variable
STINT_UPSTREAM_KEY (or the variable a config file names), never from a flag.

Without --config there is one team, "default", and no client key is needed;
that is allowed only on a loopback address.`,
		Example: `  STINT_UPSTREAM_KEY=... stint serve --upstream https://api.example.com/v1
  stint serve --upstream local:../shared/models/stories260K.gguf
  stint serve --config stint.yaml --check-config`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runServe(cmd.Context(), cmd, f)
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.listen, "listen", "", "address to listen on")
	fl.StringVar(&f.upstream, "upstream", "", "upstream base URL including its version path (https://host/v1), or local:MODEL.gguf to run the local model in-process")
	fl.StringVar(&f.data, "data", "", "data directory for the embedded store")
	fl.StringVar(&f.config, "config", "", "YAML config file (see \"stint config example\")")
	fl.StringVar(&f.logFormat, "log-format", "", "request log format: json or text")
	fl.BoolVar(&f.logPrompts, "log-prompts", false, "include prompt text in request logs (debugging only)")
	fl.BoolVar(&f.checkConfig, "check-config", false, "validate the configuration, print a one-line summary and exit, opening nothing (no store, Redis, model or listener)")
	describeFlag(fl, "listen", "ADDR", "the config's listen, else "+DefaultConfig().Listen)
	describeFlag(fl, "upstream", "URL", "")
	describeFlag(fl, "data", "DIR", "the config's data, else "+DefaultConfig().Data)
	describeFlag(fl, "config", "FILE", "")
	describeFlag(fl, "log-format", "FORMAT", "the config's log.format, else text")
	return cmd
}

// resolveConfig merges defaults, the config file and flags.
func resolveConfig(f serveFlags) (Config, error) {
	cfg := DefaultConfig()
	if f.config != "" {
		var err error
		if cfg, err = LoadConfig(f.config); err != nil {
			return Config{}, err
		}
	}
	if f.listen != "" {
		cfg.Listen = f.listen
	}
	if f.data != "" {
		cfg.Data = f.data
	}
	if f.logFormat != "" {
		cfg.Log.Format = f.logFormat
	}
	if f.logPrompts {
		cfg.Log.Prompts = true
	}
	if f.upstream != "" {
		cfg.Upstreams = []UpstreamConfig{{Name: "default", URL: f.upstream, KeyEnv: "STINT_UPSTREAM_KEY"}}
	}
	if len(cfg.Upstreams) == 0 {
		return Config{}, errors.New("no upstream: give --upstream URL (or local:MODEL.gguf) or list upstreams in the config")
	}
	if err := cfg.Validate(nil); err != nil {
		return Config{}, err
	}
	if len(cfg.Teams) == 0 && !isLoopback(cfg.Listen) {
		return Config{}, fmt.Errorf("refusing to listen on %s without a config: with no teams configured anyone who can reach the port could spend on your upstream key; listen on a loopback address (127.0.0.1) or give --config with teams and keys", cfg.Listen)
	}
	return cfg, nil
}

// isLoopback reports whether addr's host is a loopback address.
func isLoopback(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func newLogger(format string, w io.Writer) *slog.Logger {
	if format == "json" {
		return slog.New(slog.NewJSONHandler(w, nil))
	}
	return slog.New(slog.NewTextHandler(w, nil))
}

func runServe(ctx context.Context, cmd *cobra.Command, f serveFlags) error {
	cfg, err := resolveConfig(f)
	if err != nil {
		return err
	}
	if f.checkConfig {
		summary, err := checkConfig(cfg, os.LookupEnv)
		if err != nil {
			return err
		}
		fmt.Fprintln(cmd.OutOrStdout(), "config ok: "+summary)
		return nil
	}
	sink := newBufferedLog(os.Stderr)
	defer sink.Close()
	log := newLogger(cfg.Log.Format, sink)
	var requestLog io.Writer // nil: request lines go through log
	if cfg.Log.Format == "json" {
		requestLog = sink
	}
	srv, err := buildServer(ctx, cfg, log, requestLog)
	if err != nil {
		return err
	}
	return srv.run(ctx)
}

// checkConfig finishes what --check-config checks after resolveConfig has
// loaded and validated the config: the spend settings are built as
// buildSpend builds them, and nothing is opened (no store, no Redis, no
// model file, no listener). It returns a one-line summary. Environment
// variables the config names for secrets are reported as set or not set
// but are not required, since configs are often checked where the secrets
// are absent (CI, image builds); their values are never printed.
func checkConfig(cfg Config, lookupEnv func(string) (string, bool)) (string, error) {
	if spendOn(cfg) {
		if _, err := guardConfig(cfg); err != nil {
			return "", fmt.Errorf("spend control: %w", err)
		}
	}
	var names, env []string
	for i, u := range cfg.Upstreams {
		name := u.Name
		if name == "" {
			name = fmt.Sprintf("upstream-%d", i)
		}
		names = append(names, name)
		if u.KeyEnv != "" && !strings.HasPrefix(u.URL, "local:") {
			env = append(env, u.KeyEnv)
		}
	}
	var b strings.Builder
	fmt.Fprintf(&b, "listen %s, data %s, upstreams %s, %d teams, %d admin keys", cfg.Listen, cfg.Data, strings.Join(names, " "), len(cfg.Teams), len(cfg.Admin.Keys))
	if spendOn(cfg) {
		fmt.Fprintf(&b, ", spend control on (%d prices)", len(cfg.Prices))
	} else {
		b.WriteString(", spend control off")
	}
	fmt.Fprintf(&b, ", metrics %s", cfg.Metrics.auth(len(cfg.Teams)))
	if cfg.Metrics.TokenEnv != "" {
		env = append(env, cfg.Metrics.TokenEnv)
	}
	if r := cfg.Store.Redis; r != nil {
		mode := "standalone"
		if len(r.Addrs) > 1 || r.Cluster {
			mode = "cluster"
		}
		fmt.Fprintf(&b, ", redis %s (%s)", mode, strings.Join(r.Addrs, " "))
		if r.PasswordEnv != "" {
			env = append(env, r.PasswordEnv)
		}
	} else {
		b.WriteString(", embedded store only")
	}
	for i, name := range env {
		sep := ", "
		if i == 0 {
			sep = "; env "
		}
		state := "set"
		if v, ok := lookupEnv(name); !ok || v == "" {
			state = "not set"
		}
		fmt.Fprintf(&b, "%s%s %s", sep, name, state)
	}
	return b.String(), nil
}

// server is a wired proxy with its store and listener settings.
type server struct {
	cfg     Config
	log     *slog.Logger
	proxy   *proxy.Proxy
	store   cache.Store
	commits func(func(*bbolt.Tx) error) error // the embedded file's shared group commit
	spend   proxy.SpendControl                // nil when the config prices nothing
	closers []func() error

	// redis is the client of store.redis (nil without it), shared by the
	// cache store, the run journal and spend control.
	redis redis.UniversalClient
}

// buildServer opens the stores and builds the proxy. requestLog, when not
// nil, takes the per-request JSON lines on the proxy's fast path.
func buildServer(ctx context.Context, cfg Config, log *slog.Logger, requestLog io.Writer) (*server, error) {
	if err := os.MkdirAll(cfg.Data, 0o700); err != nil {
		return nil, fmt.Errorf("create data dir: %w", err)
	}
	s := &server{cfg: cfg, log: log}
	disk, err := boltstore.Open(filepath.Join(cfg.Data, "stint.db"), boltstore.Options{MaxBytes: int64(cfg.Cache.MaxBytes), BatchDelay: 10 * time.Millisecond})
	if err != nil {
		return nil, fmt.Errorf("open store: %w", err)
	}
	s.closers = append(s.closers, disk.Close)
	// The cache's, the ledger's and the run journal's writes share commits.
	s.commits = disk.Update
	store, shared, err := s.buildStore(ctx, cfg, disk)
	if err != nil {
		s.close()
		return nil, err
	}
	s.store = store

	ups, closers, err := buildUpstreams(ctx, cfg.Upstreams)
	if err != nil {
		s.close()
		return nil, err
	}
	s.closers = append(s.closers, closers...)
	breakerStore, err := s.buildBreakerStore(ctx, cfg)
	if err != nil {
		s.close()
		return nil, err
	}
	teams, err := buildTeams(cfg.Teams)
	if err != nil {
		s.close()
		return nil, err
	}
	spend, err := s.buildSpend(ctx, cfg, disk)
	if err != nil {
		s.close()
		return nil, err
	}
	s.spend = spend
	var adminKeys [][sha256.Size]byte
	for _, k := range cfg.Admin.Keys {
		h, err := parseKeyHash(k)
		if err != nil {
			s.close()
			return nil, fmt.Errorf("admin: %w", err)
		}
		adminKeys = append(adminKeys, h)
	}
	var journal runs.Journal
	if s.redis != nil {
		journal = runs.NewRedis(s.redis, runs.RedisOptions{Prefix: cfg.Store.Redis.prefix(), QuotaBytes: int64(cfg.Runs.QuotaBytes)})
	} else if journal, err = runs.NewBolt(disk.DB(), runs.BoltOptions{Update: s.commits, QuotaBytes: int64(cfg.Runs.QuotaBytes)}); err != nil {
		s.close()
		return nil, fmt.Errorf("open run journal: %w", err)
	}
	metrics, err := metricsAccess(cfg, os.LookupEnv)
	if err != nil {
		s.close()
		return nil, err
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	p, err := proxy.New(proxy.Options{
		Store:          store,
		Upstreams:      ups,
		Secrets:        upstreamSecrets(cfg.Upstreams, os.Getenv),
		Teams:          teams,
		MaxBodyBytes:   int64(cfg.Server.MaxBodyBytes),
		MaxInFlight:    cfg.Server.MaxInFlightPerTeam,
		MaxPrompts:     cfg.Server.MaxPrompts,
		WriteTimeout:   time.Duration(cfg.Server.WriteTimeout),
		CacheTTL:       time.Duration(cfg.Cache.TTL),
		CacheSampled:   cfg.Cache.Sampled,
		UncachedModels: cfg.Cache.UncachedModels,
		Logger:         log,
		LogPrompts:     cfg.Log.Prompts,
		RequestLog:     requestLog,
		Registerer:     reg,
		Gatherer:       reg,
		Metrics:        metrics,
		Spend:          spend,
		AdminKeyHashes: adminKeys,
		Runs:           journal,
		RunImport:      runs.ImportOptions{MaxBytes: int64(cfg.Runs.MaxArchiveBytes), MaxBodyBytes: int64(cfg.Runs.MaxBodyBytes)},
		UI:             proxy.UIOptions{SearchSidecar: cfg.UI.SearchSidecar, SidecarTimeout: time.Duration(cfg.UI.SidecarTimeout), Refresh: time.Duration(cfg.UI.Refresh)},
		SharedFlights:  shared,
		BreakerStore:   breakerStore,

		StoreBeforeAnswer: cfg.storeBeforeAnswer(),
	})
	if err != nil {
		s.close()
		return nil, err
	}
	s.proxy = p
	return s, nil
}

// buildStore opens the cache store: the embedded file, or with store.redis
// (and its cache not turned off) Redis, shared by every replica, which then
// also coalesces misses across replicas. The hot tier goes in front of
// either; in front of Redis its entries are served without asking Redis for
// at most store.redis.hot_ttl, so a replica serves an answer another has
// refreshed only that long, and (store.redis.stale_if_error) stay to be
// served while Redis cannot be read. It connects s.redis when the config has
// store.redis.
func (s *server) buildStore(ctx context.Context, cfg Config, disk *boltstore.Store) (cache.Store, proxy.SharedFlights, error) {
	var (
		store  cache.Store = disk
		shared proxy.SharedFlights
		hot    = cache.HotOptions{MaxBytes: int64(cfg.Cache.HotBytes)}
	)
	if rc := cfg.Store.Redis; rc != nil {
		client, err := rc.client(ctx)
		if err != nil {
			return nil, nil, fmt.Errorf("store.redis: %w", err)
		}
		s.closers = append(s.closers, client.Close)
		s.redis = client
		if rc.sharedCache() {
			rs, err := redisstore.New(client, redisstore.Options{Prefix: rc.prefix(), Timeout: rc.timeout(), LeaseTTL: rc.lease()})
			if err != nil {
				return nil, nil, fmt.Errorf("store.redis: %w", err)
			}
			s.closers = append(s.closers, rs.Close) // before the client's
			store, shared = rs, rs
			hot.MaxAge, hot.StaleIfError = rc.hotTTL(), rc.staleIfError()
		}
	}
	if cfg.Cache.HotBytes > 0 {
		store = cache.NewHot(store, hot)
	}
	return store, shared, nil
}

// spendOn reports whether the config asks for spend control: it does as
// soon as it prices anything.
func spendOn(cfg Config) bool { return len(cfg.Prices) > 0 || cfg.DefaultPrice != nil }

// buildSpend wires spend control on the embedded ledger (the same file as
// the cache), or on Redis when the config has store.redis, and starts the sweep that settles expired leases; nil when the
// config prices nothing.
func (s *server) buildSpend(ctx context.Context, cfg Config, disk *boltstore.Store) (proxy.SpendControl, error) {
	if !spendOn(cfg) {
		return nil, nil
	}
	gc, err := guardConfig(cfg)
	if err != nil {
		return nil, err
	}
	var (
		ledger  budget.Ledger
		journal budget.Journal
		limiter ratelimit.Limiter
	)
	if rc := cfg.Store.Redis; rc != nil {
		client := s.redis
		l := redisledger.New(client, rc.ledgerOptions(gc.Location))
		ledger, journal, gc.Overrides = l, l, l
		limiter = redisrate.New(client, redisrate.Options{Prefix: rc.prefix(), ServerClock: true})
		if oa := cfg.Budget.OutageAllowance; oa != nil {
			c, err := capOf(*oa, nil, "budget", "outage_allowance")
			if err != nil {
				return nil, err
			}
			al, err := allowance.New(l, disk.DB(), allowance.Options{Allowance: *c, Location: gc.Location})
			if err != nil {
				return nil, err
			}
			ledger, journal, gc.Overrides = al, al, al
		}
	} else {
		l, err := boltledger.New(disk.DB(), boltledger.Options{Location: gc.Location, Update: s.commits})
		if err != nil {
			return nil, fmt.Errorf("open ledger: %w", err)
		}
		ledger, journal, limiter, gc.Overrides = l, l, &ratelimit.Local{}, l
	}
	g, err := guard.New(gc, ledger, journal, limiter, nil)
	if err != nil {
		return nil, fmt.Errorf("spend control: %w", err)
	}
	sweepCtx, cancel := context.WithCancel(context.WithoutCancel(ctx))
	done := make(chan struct{})
	go func() {
		defer close(done)
		_ = g.Run(sweepCtx, func(err error) { s.log.Warn("lease sweep failed", "err", err) })
	}()
	s.closers = append(s.closers, func() error { cancel(); <-done; return nil })
	return g, nil
}

// buildBreakerStore shares the upstreams' breaker state on Redis when the
// config has store.redis (nil otherwise: each replica keeps its own). A
// Redis that fails later is not fatal: each breaker falls back to its
// replica's own state until Redis answers again.
func (s *server) buildBreakerStore(ctx context.Context, cfg Config) (gobreaker.SharedDataStore, error) {
	rc := cfg.Store.Redis
	if rc == nil {
		return nil, nil
	}
	client, err := rc.client(ctx)
	if err != nil {
		return nil, fmt.Errorf("breaker state on redis: %w", err)
	}
	s.closers = append(s.closers, client.Close)
	timeout := time.Duration(rc.Timeout)
	if timeout == 0 {
		timeout = defaultRedisTimeout
	}
	st, err := redisstate.New(client, redisstate.Options{Prefix: rc.prefix(), Timeout: timeout})
	if err != nil {
		return nil, fmt.Errorf("breaker state on redis: %w", err)
	}
	return st, nil
}

func buildTeams(cfgs []TeamConfig) ([]proxy.Team, error) {
	teams := make([]proxy.Team, 0, len(cfgs))
	for _, tc := range cfgs {
		t := proxy.Team{Name: tc.Name, Namespace: tc.Namespace, CacheOff: tc.Cache != nil && !*tc.Cache, MaxInFlight: tc.MaxInFlight}
		for _, k := range tc.Keys {
			h, err := parseKeyHash(k)
			if err != nil {
				return nil, fmt.Errorf("team %s: %w", tc.Name, err)
			}
			t.KeyHashes = append(t.KeyHashes, h)
		}
		teams = append(teams, t)
	}
	return teams, nil
}

func buildUpstreams(ctx context.Context, cfgs []UpstreamConfig) ([]proxy.Upstream, []func() error, error) {
	var ups []proxy.Upstream
	var closers []func() error
	for i, uc := range cfgs {
		u := proxy.Upstream{Name: uc.Name, BaseURL: uc.URL, Timeout: time.Duration(uc.Timeout), Models: uc.Models,
			Breaker: uc.breakerSettings(), Retry: uc.retryPolicy(), Fallback: uc.Fallback, MaxConcurrent: uc.MaxConcurrent,
			MaxLogprobs: uc.MaxLogprobs}
		if u.Name == "" {
			u.Name = fmt.Sprintf("upstream-%d", i)
		}
		if path, ok := strings.CutPrefix(uc.URL, "local:"); ok {
			client, m, closeFn, err := localUpstreamClient(ctx, path)
			if err != nil {
				return nil, closers, fmt.Errorf("upstream %s: %w", u.Name, err)
			}
			u.BaseURL = "http://local.stint.invalid/v1"
			u.Client = client
			// The local model answers any name as itself: route it only
			// the name it serves, so another is refused, not answered by it.
			if len(u.Models) == 0 {
				u.Models = []string{localmodel.DefaultName}
			}
			if u.MaxLogprobs == 0 {
				u.MaxLogprobs = m.VocabSize()
			}
			closers = append(closers, closeFn)
		} else if uc.KeyEnv != "" {
			u.Key = os.Getenv(uc.KeyEnv)
		}
		ups = append(ups, u)
	}
	return ups, closers, nil
}

// metricsAccess turns the metrics section into the proxy's access rule,
// reading the token from the environment.
func metricsAccess(cfg Config, lookupEnv func(string) (string, bool)) (proxy.MetricsAccess, error) {
	auth := cfg.Metrics.auth(len(cfg.Teams))
	var a proxy.MetricsAccess
	switch auth {
	case MetricsOpen:
		return a, nil
	case MetricsOff:
		return proxy.MetricsAccess{Off: true}, nil
	case MetricsAdmin:
		a.Admin = true
	}
	if name := cfg.Metrics.TokenEnv; name != "" {
		v, ok := lookupEnv(name)
		if !ok || v == "" {
			return a, fmt.Errorf("metrics.token_env: %s is not set", name)
		}
		a.TokenHashes = append(a.TokenHashes, sha256.Sum256([]byte(v)))
	}
	return a, nil
}

// upstreamSecrets are the upstream credentials in the environment that the
// proxy masks in upstream answers: STINT_UPSTREAM_KEY and every upstream's
// key_env, whether or not an upstream sends it.
func upstreamSecrets(cfgs []UpstreamConfig, getenv func(string) string) []string {
	names := []string{"STINT_UPSTREAM_KEY"}
	for _, uc := range cfgs {
		if uc.KeyEnv != "" {
			names = append(names, uc.KeyEnv)
		}
	}
	var out []string
	for _, n := range names {
		if v := getenv(n); v != "" {
			out = append(out, v)
		}
	}
	return out
}

func (s *server) close() error {
	var first error
	for i := len(s.closers) - 1; i >= 0; i-- {
		if err := s.closers[i](); err != nil && first == nil {
			first = err
		}
	}
	s.closers = nil
	return first
}

// run serves until ctx ends, then drains: new work is refused by /readyz,
// in-flight requests finish (up to the shutdown timeout) and the store
// closes cleanly.
func (s *server) run(ctx context.Context) error {
	ln, err := net.Listen("tcp", s.cfg.Listen)
	if err != nil {
		s.close()
		return fmt.Errorf("listen: %w", err)
	}
	return s.serve(ctx, ln)
}

func (s *server) serve(ctx context.Context, ln net.Listener) error {
	sc := s.cfg.Server
	hs := &http.Server{
		Handler:           s.proxy,
		ReadHeaderTimeout: time.Duration(sc.ReadHeaderTimeout),
		ReadTimeout:       time.Duration(sc.ReadTimeout),
		WriteTimeout:      time.Duration(sc.WriteTimeout), // moved ahead on every write (proxy.Options.WriteTimeout)
		IdleTimeout:       time.Duration(sc.IdleTimeout),
		ErrorLog:          slog.NewLogLogger(s.log.Handler(), slog.LevelWarn),
	}
	errc := make(chan error, 1)
	go func() { errc <- hs.Serve(ln) }()
	s.log.Info("stint serve listening", "addr", ln.Addr().String(), "upstreams", len(s.cfg.Upstreams), "teams", len(s.cfg.Teams), "data", s.cfg.Data)
	var serveErr error
	select {
	case serveErr = <-errc:
	case <-ctx.Done():
		s.log.Info("shutting down: finishing in-flight requests")
		s.proxy.Drain()
		sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Duration(s.cfg.Server.ShutdownTimeout))
		defer cancel()
		if err := hs.Shutdown(sctx); err != nil {
			serveErr = fmt.Errorf("shutdown: %w", err)
		}
	}
	if errors.Is(serveErr, http.ErrServerClosed) {
		serveErr = nil
	}
	wctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Duration(s.cfg.Server.ShutdownTimeout))
	defer cancel()
	if err := s.proxy.Close(wctx); err != nil && serveErr == nil {
		serveErr = fmt.Errorf("finish store writes: %w", err)
	}
	if err := s.close(); err != nil && serveErr == nil {
		serveErr = fmt.Errorf("close store: %w", err)
	}
	return serveErr
}
