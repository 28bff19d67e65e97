package main

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"net"
	"os"
	"reflect"
	"strconv"
	"strings"
	"time"

	"go.yaml.in/yaml/v3"

	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/retry"
)

// Config is the file given to `stint serve --config`. The library packages
// never see YAML: buildServer turns a Config into their option structs.
type Config struct {
	Listen    string           `yaml:"listen"`
	Data      string           `yaml:"data"`
	Upstreams []UpstreamConfig `yaml:"upstreams"`
	Teams     []TeamConfig     `yaml:"teams"`
	Cache     CacheConfig      `yaml:"cache"`
	Runs      RunsConfig       `yaml:"runs"`
	Server    ServerConfig     `yaml:"server"`
	Log       LogConfig        `yaml:"log"`
	// Spend control (budgetconfig.go): prices in USD per million tokens,
	// the price of models not listed, and shared budget settings.
	Prices       map[string]PriceConfig `yaml:"prices"`
	DefaultPrice *PriceConfig           `yaml:"default_price"`
	Budget       BudgetConfig           `yaml:"budget"`
	// Store says where state shared between replicas lives
	// (storeconfig.go).
	Store StoreConfig `yaml:"store"`
	// Admin holds the keys of the admin endpoints (/stint/admin/).
	Admin AdminConfig `yaml:"admin"`
	// Metrics says who may read /metrics.
	Metrics MetricsConfig `yaml:"metrics"`
	UI      UIConfig      `yaml:"ui"` // the operator page (uiconfig.go)
}

// AdminConfig is the `admin:` section.
type AdminConfig struct {
	// Keys may read spend and set budgets over HTTP, stored as
	// "sha256:<hex>" like team keys. None: the admin endpoints are off.
	Keys []string `yaml:"keys"`
}

// The values of metrics.auth.
const (
	MetricsOpen  = "open"  // anyone who reaches the port
	MetricsToken = "token" // the bearer token in metrics.token_env
	MetricsAdmin = "admin" // an admin key, or that token
	MetricsOff   = "off"   // no /metrics
)

// MetricsConfig is the `metrics:` section.
type MetricsConfig struct {
	// Auth is open, token, admin or off; empty: admin when teams are
	// configured (the metrics name them), open otherwise (loopback only).
	Auth string `yaml:"auth"`
	// TokenEnv names the environment variable holding a bearer token that
	// may read /metrics (a scraper's); needed by auth: token.
	TokenEnv string `yaml:"token_env"`
}

// auth is the access rule in force: Auth, or its default.
func (m MetricsConfig) auth(teams int) string {
	switch {
	case m.Auth != "":
		return m.Auth
	case teams > 0:
		return MetricsAdmin
	}
	return MetricsOpen
}

// UpstreamConfig is one inference API.
type UpstreamConfig struct {
	Name    string   `yaml:"name"`
	URL     string   `yaml:"url"`
	KeyEnv  string   `yaml:"key_env"`
	Timeout Duration `yaml:"timeout"`
	Models  []string `yaml:"models"`
	// Limits is the shared ceiling of all teams on this upstream.
	Limits *LimitsConfig `yaml:"limits"`
	// Breaker is the upstream's circuit breaker; absent: on with the
	// defaults.
	Breaker *BreakerConfig `yaml:"breaker"`
	// Retry bounds the retries of failed calls; absent: the defaults.
	Retry *RetryConfig `yaml:"retry"`
	// Fallback names upstreams to use, in order, while this one's breaker
	// is open.
	Fallback []string `yaml:"fallback"`
	// MaxConcurrent caps this replica's calls in flight to the upstream;
	// 0: no cap.
	MaxConcurrent int `yaml:"max_concurrent"`
	// MaxLogprobs is the most top log-probabilities per token the upstream
	// serves; a request for more is refused before it is sent. 0: 20 (a
	// local: model's vocabulary size).
	MaxLogprobs int `yaml:"max_logprobs"`
}

// BreakerConfig is an upstream's `breaker:` section. Absent or 0 fields
// take the defaults; -1 turns a trip rule off.
type BreakerConfig struct {
	// Enabled false turns the breaker off; absent: on.
	Enabled *bool `yaml:"enabled"`
	// ConsecutiveFailures opens it after this many failures in a row
	// (default 5).
	ConsecutiveFailures int `yaml:"consecutive_failures"`
	// FailureRatio opens it when this share of the calls in Window failed
	// (default 0.5), once Window holds MinRequests calls.
	FailureRatio float64 `yaml:"failure_ratio"`
	// MinRequests is how many calls Window must hold before FailureRatio
	// applies (default 20).
	MinRequests int `yaml:"min_requests"`
	// Window is the rolling window of FailureRatio (default 1m).
	Window Duration `yaml:"window"`
	// OpenFor is how long it stays open before probing (default 30s).
	OpenFor Duration `yaml:"open_for"`
	// Probes is how many calls a half-open breaker lets through at once
	// per replica, and the successes that close it (default 1).
	Probes int `yaml:"probes"`
	// ProbeEvery lets one call through while open, this often, as an
	// early probe whose success closes the breaker (default a sixth of
	// open_for; 0s: no early probes).
	ProbeEvery *Duration `yaml:"probe_every"`
}

// probeShare is open_for over the default probe_every.
const probeShare = 6

// RetryConfig is an upstream's `retry:` section.
type RetryConfig struct {
	// Attempts is the most calls in all, the first included (default 3;
	// 1 means no retries).
	Attempts int `yaml:"attempts"`
	// BaseDelay is the first backoff ceiling (default 250ms); retry n waits
	// a random time up to min(max_delay, base_delay·2^n).
	BaseDelay Duration `yaml:"base_delay"`
	// MaxDelay caps the backoff and is the longest Retry-After waited for
	// (default 5s).
	MaxDelay Duration `yaml:"max_delay"`
	// BudgetShare is the share of a retry each call adds to the budget
	// that retries after a 429 are paid from (default 0.1).
	BudgetShare float64 `yaml:"budget_share"`
	// BudgetReserve is the most retries the budget holds; it starts full
	// (default 10; -1: no budget, every 429 retried up to attempts).
	BudgetReserve int `yaml:"budget_reserve"`
}

// TeamConfig is one client team.
type TeamConfig struct {
	Name      string   `yaml:"name"`
	Keys      []string `yaml:"keys"`
	Namespace string   `yaml:"namespace"`
	Cache     *bool    `yaml:"cache"`
	// Budget caps the team's spend; nil: no team budget.
	Budget *CapConfig `yaml:"budget"`
	// Limits are the team's rate limits.
	Limits *LimitsConfig `yaml:"limits"`
	// KeyBudgets caps single keys, by key id: the first 12 hex digits of
	// the key's sha256 as listed under keys.
	KeyBudgets map[string]CapConfig `yaml:"key_budgets"`
	// MaxInFlight caps the team's requests in flight on one replica in
	// place of server.max_in_flight_per_team; 0: that default, -1: no cap.
	MaxInFlight int `yaml:"max_in_flight"`
}

// CacheConfig sets how answers are kept.
type CacheConfig struct {
	TTL            Duration `yaml:"ttl"`
	MaxBytes       ByteSize `yaml:"max_bytes"`
	HotBytes       ByteSize `yaml:"hot_bytes"`
	Sampled        bool     `yaml:"sampled"`
	UncachedModels []string `yaml:"uncached_models"`
	// StoreBeforeAnswer releases a miss's answer only once its entry is
	// stored (on the embedded store: fsynced). Default true on the
	// embedded store, false when the cache is on Redis.
	StoreBeforeAnswer *bool `yaml:"store_before_answer"`
}

// storeBeforeAnswer is cache.store_before_answer with its default: on for
// the embedded store, off for the shared cache on Redis.
func (c *Config) storeBeforeAnswer() bool {
	if v := c.Cache.StoreBeforeAnswer; v != nil {
		return *v
	}
	return c.Store.Redis == nil || !c.Store.Redis.sharedCache()
}

// RunsConfig is the `runs:` section: what recorded and imported runs may
// hold.
type RunsConfig struct {
	// QuotaBytes bounds what each team's runs (recorded and imported)
	// hold; a Record or import past it is refused with 403. -1: no quota.
	QuotaBytes ByteSize `yaml:"quota_bytes"`
	// MaxArchiveBytes bounds one imported archive, uncompressed (413
	// past it).
	MaxArchiveBytes ByteSize `yaml:"max_archive_bytes"`
	// MaxBodyBytes bounds one answer body in an imported archive (413
	// past it).
	MaxBodyBytes ByteSize `yaml:"max_body_bytes"`
}

// ServerConfig sets HTTP limits.
type ServerConfig struct {
	MaxBodyBytes    ByteSize `yaml:"max_body_bytes"`
	ShutdownTimeout Duration `yaml:"shutdown_timeout"`
	// ReadHeaderTimeout bounds reading a request's headers.
	ReadHeaderTimeout Duration `yaml:"read_header_timeout"`
	// ReadTimeout bounds reading a whole request, body included (not the
	// wait for its answer).
	ReadTimeout Duration `yaml:"read_timeout"`
	// WriteTimeout bounds each write of an answer: a client that stops
	// reading is cut off after it; a stream that keeps flowing is not.
	WriteTimeout Duration `yaml:"write_timeout"`
	// IdleTimeout is how long a keep-alive connection may wait for its
	// next request.
	IdleTimeout Duration `yaml:"idle_timeout"`
	// MaxInFlightPerTeam caps each team's requests in flight on one
	// replica (a team's max_in_flight overrides it); 0: no cap.
	MaxInFlightPerTeam int `yaml:"max_in_flight_per_team"`
	// MaxPrompts bounds the prompts of one completions request (the items
	// of an array prompt); more get 400 too_many_prompts.
	MaxPrompts int `yaml:"max_prompts"`
}

// LogConfig sets request logging.
type LogConfig struct {
	Format  string `yaml:"format"`
	Prompts bool   `yaml:"prompts"`
}

// DefaultConfig is the configuration used without --config.
func DefaultConfig() Config {
	return Config{
		Listen: "127.0.0.1:8787",
		Data:   "./stint-data",
		Cache: CacheConfig{
			MaxBytes: 2 << 30,
			HotBytes: 128 << 20,
		},
		Runs: RunsConfig{
			QuotaBytes:      runs.DefaultQuotaBytes,
			MaxArchiveBytes: runs.DefaultMaxArchiveBytes,
			MaxBodyBytes:    runs.MaxBodyBytes,
		},
		Server: ServerConfig{
			MaxBodyBytes:       4 << 20,
			ShutdownTimeout:    Duration(30 * time.Second),
			ReadHeaderTimeout:  Duration(10 * time.Second),
			ReadTimeout:        Duration(time.Minute),
			WriteTimeout:       Duration(time.Minute),
			IdleTimeout:        Duration(2 * time.Minute),
			MaxInFlightPerTeam: 256,
			MaxPrompts:         proxy.DefaultMaxPrompts,
		},
		Log: LogConfig{Format: "text"},
	}
}

// ConfigError is a problem in the config file, naming the field and line.
type ConfigError struct {
	Field string
	Line  int
	Err   error
}

func (e *ConfigError) Error() string {
	if e.Line > 0 {
		return fmt.Sprintf("config line %d: %s: %v", e.Line, e.Field, e.Err)
	}
	return fmt.Sprintf("config: %s: %v", e.Field, e.Err)
}

func (e *ConfigError) Unwrap() error { return e.Err }

// ParseConfig reads a YAML config over the defaults and validates it.
// Unknown keys are errors.
func ParseConfig(r io.Reader) (Config, error) {
	src, err := io.ReadAll(r)
	if err != nil {
		return Config{}, fmt.Errorf("read config: %w", err)
	}
	cfg := DefaultConfig()
	var root yaml.Node
	if err := yaml.Unmarshal(src, &root); err != nil {
		return Config{}, fmt.Errorf("config is not valid YAML: %s", yamlErrorText(err))
	}
	if err := checkShape(&root, reflect.TypeOf(cfg), nil); err != nil {
		return Config{}, err
	}
	dec := yaml.NewDecoder(bytes.NewReader(src))
	dec.KnownFields(true)
	if err := dec.Decode(&cfg); err != nil && !errors.Is(err, io.EOF) {
		return Config{}, fmt.Errorf("config: %s", yamlErrorText(err))
	}
	if err := cfg.Validate(&root); err != nil {
		return Config{}, err
	}
	return cfg, nil
}

// LoadConfig reads and validates the config file at path.
func LoadConfig(path string) (Config, error) {
	f, err := os.Open(path)
	if err != nil {
		return Config{}, fmt.Errorf("open config: %w", err)
	}
	defer f.Close()
	return ParseConfig(f)
}

// Validate checks the config; root (may be nil) supplies line numbers.
func (c *Config) Validate(root *yaml.Node) error {
	bad := func(err error, path ...any) error {
		return &ConfigError{Field: fieldPath(path), Line: lineOf(root, path), Err: err}
	}
	if c.Listen != "" {
		if _, _, err := net.SplitHostPort(c.Listen); err != nil {
			return bad(err, "listen")
		}
	}
	names := map[string]bool{}
	for i, u := range c.Upstreams {
		if u.URL == "" {
			return bad(errors.New("url is required"), "upstreams", i, "url")
		}
		if !strings.HasPrefix(u.URL, "http://") && !strings.HasPrefix(u.URL, "https://") && !strings.HasPrefix(u.URL, "local:") {
			return bad(fmt.Errorf("url %q must start with http://, https:// or local: followed by a model file", u.URL), "upstreams", i, "url")
		}
		if u.Timeout < 0 {
			return bad(errors.New("timeout must not be negative"), "upstreams", i, "timeout")
		}
		name := u.Name
		if name == "" {
			name = fmt.Sprintf("upstream-%d", i)
		}
		if names[name] {
			return bad(fmt.Errorf("duplicate upstream name %q", name), "upstreams", i, "name")
		}
		names[name] = true
		if err := validateResilience(u, bad, "upstreams", i); err != nil {
			return err
		}
	}
	for i, u := range c.Upstreams {
		name := u.Name
		if name == "" {
			name = fmt.Sprintf("upstream-%d", i)
		}
		seen := map[string]bool{}
		for j, fb := range u.Fallback {
			switch {
			case !names[fb]:
				return bad(fmt.Errorf("fallback %q is not the name of an upstream", fb), "upstreams", i, "fallback", j)
			case fb == name:
				return bad(errors.New("an upstream cannot be its own fallback"), "upstreams", i, "fallback", j)
			case seen[fb]:
				return bad(fmt.Errorf("fallback %q is listed twice", fb), "upstreams", i, "fallback", j)
			}
			seen[fb] = true
		}
	}
	teams := map[string]bool{}
	keys := map[string]string{}
	for i, t := range c.Teams {
		if t.Name == "" {
			return bad(errors.New("name is required"), "teams", i, "name")
		}
		if teams[t.Name] {
			return bad(fmt.Errorf("duplicate team %q", t.Name), "teams", i, "name")
		}
		teams[t.Name] = true
		if t.MaxInFlight < -1 {
			return bad(errors.New("max_in_flight must be positive, 0 (server.max_in_flight_per_team) or -1 (no cap)"), "teams", i, "max_in_flight")
		}
		if len(t.Keys) == 0 {
			return bad(errors.New("a team needs at least one key (make one with `stint keys new --team NAME`)"), "teams", i, "keys")
		}
		for j, k := range t.Keys {
			h, err := parseKeyHash(k)
			if err != nil {
				return bad(err, "teams", i, "keys", j)
			}
			hx := hex.EncodeToString(h[:])
			if other, dup := keys[hx]; dup {
				return bad(fmt.Errorf("key is also listed for team %q", other), "teams", i, "keys", j)
			}
			keys[hx] = t.Name
		}
	}
	if c.Cache.TTL < 0 {
		return bad(errors.New("ttl must not be negative"), "cache", "ttl")
	}
	if c.Cache.MaxBytes < 0 {
		return bad(errors.New("max_bytes must not be negative"), "cache", "max_bytes")
	}
	if c.Cache.HotBytes < 0 {
		return bad(errors.New("hot_bytes must not be negative"), "cache", "hot_bytes")
	}
	switch r := c.Runs; {
	case r.QuotaBytes == 0 || r.QuotaBytes < -1:
		return bad(errors.New("quota_bytes must be positive, or -1 for no quota"), "runs", "quota_bytes")
	case r.MaxArchiveBytes <= 0:
		return bad(errors.New("max_archive_bytes must be positive"), "runs", "max_archive_bytes")
	case r.MaxBodyBytes <= 0 || r.MaxBodyBytes > r.MaxArchiveBytes:
		return bad(errors.New("max_body_bytes must be positive and at most max_archive_bytes"), "runs", "max_body_bytes")
	}
	if err := c.Server.validate(root); err != nil {
		return err
	}
	switch c.Log.Format {
	case "json", "text":
	default:
		return bad(fmt.Errorf("format %q must be json or text", c.Log.Format), "log", "format")
	}
	for j, k := range c.Admin.Keys {
		h, err := parseKeyHash(k)
		if err != nil {
			return bad(err, "admin", "keys", j)
		}
		if team, dup := keys[hex.EncodeToString(h[:])]; dup {
			return bad(fmt.Errorf("an admin key must not also be a key of team %q", team), "admin", "keys", j)
		}
	}
	switch c.Metrics.Auth {
	case "", MetricsOpen, MetricsAdmin, MetricsOff:
	case MetricsToken:
		if c.Metrics.TokenEnv == "" {
			return bad(errors.New("auth: token needs token_env, the environment variable holding the token"), "metrics", "auth")
		}
	default:
		return bad(fmt.Errorf("auth %q must be open, token, admin or off", c.Metrics.Auth), "metrics", "auth")
	}
	if c.Metrics.TokenEnv != "" && (c.Metrics.Auth == MetricsOpen || c.Metrics.Auth == MetricsOff) {
		return bad(fmt.Errorf("token_env is unused with auth: %s", c.Metrics.Auth), "metrics", "token_env")
	}
	if err := c.validateUI(root); err != nil {
		return err
	}
	if err := c.validateStore(root); err != nil {
		return err
	}
	return c.validateSpend(root)
}

// validate checks the server section; root (may be nil) supplies line
// numbers.
func (s ServerConfig) validate(root *yaml.Node) error {
	bad := func(err error, field string) error {
		return &ConfigError{Field: "server." + field, Line: lineOf(root, []any{"server", field}), Err: err}
	}
	if s.MaxBodyBytes <= 0 {
		return bad(errors.New("max_body_bytes must be positive"), "max_body_bytes")
	}
	for _, d := range []struct {
		name string
		v    Duration
	}{{"read_header_timeout", s.ReadHeaderTimeout}, {"read_timeout", s.ReadTimeout}, {"write_timeout", s.WriteTimeout}, {"idle_timeout", s.IdleTimeout}} {
		if d.v <= 0 {
			return bad(errors.New("must be positive: a connection without it can be held open by a client as long as it likes"), d.name)
		}
	}
	if s.ReadHeaderTimeout > s.ReadTimeout {
		return bad(errors.New("must not be longer than read_timeout, which bounds the whole request"), "read_header_timeout")
	}
	if s.MaxPrompts < 1 {
		return bad(errors.New("max_prompts must be at least 1"), "max_prompts")
	}
	if s.MaxInFlightPerTeam < 0 {
		return bad(errors.New("max_in_flight_per_team must be 0 (no cap) or more"), "max_in_flight_per_team")
	}
	return nil
}

// breakerSettings turns the breaker section into the proxy's settings.
func (u UpstreamConfig) breakerSettings() breaker.Settings {
	b := u.Breaker
	if b == nil {
		b = &BreakerConfig{}
	}
	s := breaker.Settings{
		Off:                 b.Enabled != nil && !*b.Enabled,
		ConsecutiveFailures: b.ConsecutiveFailures,
		FailureRatio:        b.FailureRatio,
		MinRequests:         b.MinRequests,
		Window:              time.Duration(b.Window),
		OpenFor:             time.Duration(b.OpenFor),
		Probes:              b.Probes,
	}
	if b.ProbeEvery != nil {
		s.ProbeEvery = time.Duration(*b.ProbeEvery)
	} else {
		openFor := s.OpenFor
		if openFor == 0 {
			openFor = breaker.DefaultOpenFor
		}
		s.ProbeEvery = openFor / probeShare
	}
	return s
}

// retryPolicy turns the retry section into the proxy's policy.
func (u UpstreamConfig) retryPolicy() retry.Policy {
	r := u.Retry
	if r == nil {
		return retry.Policy{}
	}
	p := retry.Policy{Attempts: r.Attempts, Base: time.Duration(r.BaseDelay), MaxDelay: time.Duration(r.MaxDelay),
		BudgetShare: r.BudgetShare, BudgetReserve: r.BudgetReserve}
	if p.Attempts == 1 {
		p.Attempts = -1
	}
	return p
}

// validateResilience checks an upstream's breaker, retry and
// max_concurrent settings.
func validateResilience(u UpstreamConfig, bad func(err error, path ...any) error, path ...any) error {
	at := func(p ...any) []any { return append(append([]any{}, path...), p...) }
	if u.MaxConcurrent < 0 {
		return bad(errors.New("max_concurrent must be 0 (no cap) or more"), at("max_concurrent")...)
	}
	if u.MaxLogprobs < 0 {
		return bad(errors.New("max_logprobs must be 0 (the default, 20) or more"), at("max_logprobs")...)
	}
	if b := u.Breaker; b != nil {
		switch {
		case b.ConsecutiveFailures < -1:
			return bad(errors.New("consecutive_failures must be positive, 0 (default 5) or -1 (off)"), at("breaker", "consecutive_failures")...)
		case b.FailureRatio != -1 && (b.FailureRatio < 0 || b.FailureRatio > 1):
			return bad(errors.New("failure_ratio must be above 0 and at most 1, 0 (default 0.5) or -1 (off)"), at("breaker", "failure_ratio")...)
		case b.MinRequests < 0:
			return bad(errors.New("min_requests must not be negative"), at("breaker", "min_requests")...)
		case b.Window < 0:
			return bad(errors.New("window must not be negative"), at("breaker", "window")...)
		case b.OpenFor < 0:
			return bad(errors.New("open_for must not be negative"), at("breaker", "open_for")...)
		case b.Probes < 0:
			return bad(errors.New("probes must not be negative"), at("breaker", "probes")...)
		case b.ProbeEvery != nil && *b.ProbeEvery < 0:
			return bad(errors.New("probe_every must not be negative (0s: no early probes)"), at("breaker", "probe_every")...)
		case b.ConsecutiveFailures == -1 && b.FailureRatio == -1 && (b.Enabled == nil || *b.Enabled):
			return bad(errors.New("both trip rules are off; say enabled: false to turn the breaker off"), at("breaker")...)
		}
	}
	if r := u.Retry; r != nil {
		switch {
		case r.Attempts < 0:
			return bad(errors.New("attempts must be 1 (no retries) or more, or 0 for the default 3"), at("retry", "attempts")...)
		case r.BaseDelay < 0:
			return bad(errors.New("base_delay must not be negative"), at("retry", "base_delay")...)
		case r.MaxDelay < 0:
			return bad(errors.New("max_delay must not be negative"), at("retry", "max_delay")...)
		case r.BudgetShare < 0 || r.BudgetShare > 1:
			return bad(errors.New("budget_share must be between 0 (default 0.1) and 1"), at("retry", "budget_share")...)
		case r.BudgetReserve < -1:
			return bad(errors.New("budget_reserve must be positive, 0 (default 10) or -1 (no budget)"), at("retry", "budget_reserve")...)
		}
	}
	return nil
}

// parseKeyHash reads a stored key of the form sha256:<64 hex digits>.
func parseKeyHash(s string) ([sha256.Size]byte, error) {
	var h [sha256.Size]byte
	hx, ok := strings.CutPrefix(s, "sha256:")
	if !ok {
		return h, errors.New(`keys are stored as "sha256:<hex of the key>", never in the clear (see stint keys new)`)
	}
	b, err := hex.DecodeString(hx)
	if err != nil || len(b) != sha256.Size {
		return h, errors.New("sha256: must be followed by 64 hex digits")
	}
	copy(h[:], b)
	return h, nil
}

func fieldPath(path []any) string {
	var b strings.Builder
	for _, p := range path {
		switch v := p.(type) {
		case int:
			fmt.Fprintf(&b, "[%d]", v)
		default:
			if b.Len() > 0 {
				b.WriteByte('.')
			}
			fmt.Fprint(&b, v)
		}
	}
	return b.String()
}

// lineOf finds the line of the node at path in a YAML document, or of the
// deepest ancestor present; 0 when unknown.
func lineOf(root *yaml.Node, path []any) int {
	if root == nil {
		return 0
	}
	n := root
	if n.Kind == yaml.DocumentNode && len(n.Content) > 0 {
		n = n.Content[0]
	}
	line := 0
	for _, p := range path {
		var next *yaml.Node
		switch v := p.(type) {
		case string:
			if n.Kind == yaml.MappingNode {
				for i := 0; i+1 < len(n.Content); i += 2 {
					if n.Content[i].Value == v {
						next = n.Content[i+1]
						line = n.Content[i].Line
					}
				}
			}
		case int:
			if n.Kind == yaml.SequenceNode && v < len(n.Content) {
				next = n.Content[v]
				line = next.Line
			}
		}
		if next == nil {
			return line
		}
		n = next
	}
	if n.Line > 0 {
		return n.Line
	}
	return line
}

// Duration is a time.Duration written as a Go duration string ("90s", "12h").
type Duration time.Duration

// UnmarshalYAML reads a duration string.
func (d *Duration) UnmarshalYAML(n *yaml.Node) error {
	v, err := time.ParseDuration(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %q is not a duration like 90s or 12h", n.Line, n.Value)
	}
	*d = Duration(v)
	return nil
}

// ByteSize is a size in bytes, written as a number or with a unit
// (KiB, MiB, GiB, KB, MB, GB).
type ByteSize int64

// UnmarshalYAML reads a byte size.
func (s *ByteSize) UnmarshalYAML(n *yaml.Node) error {
	v, err := parseByteSize(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %w", n.Line, err)
	}
	*s = ByteSize(v)
	return nil
}

func parseByteSize(s string) (int64, error) {
	s = strings.TrimSpace(s)
	units := []struct {
		suffix string
		mult   int64
	}{{"KiB", 1 << 10}, {"MiB", 1 << 20}, {"GiB", 1 << 30}, {"TiB", 1 << 40}, {"KB", 1e3}, {"MB", 1e6}, {"GB", 1e9}, {"TB", 1e12}, {"B", 1}}
	mult := int64(1)
	for _, u := range units {
		if num, ok := strings.CutSuffix(s, u.suffix); ok {
			s, mult = strings.TrimSpace(num), u.mult
			break
		}
	}
	v, err := strconv.ParseFloat(s, 64)
	if err != nil {
		return 0, fmt.Errorf("%q is not a size like 4194304, 512MiB or 2GiB", s)
	}
	return int64(v * float64(mult)), nil
}
