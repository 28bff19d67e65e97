package main

import (
	"encoding/hex"
	"errors"
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	// Budget periods roll over in a configured time zone; embedding the
	// zone database makes time_zone work in minimal containers too.
	_ "time/tzdata"

	"go.yaml.in/yaml/v3"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/tokens"
)

// BudgetConfig is the `budget:` section: settings shared by every team's
// spend control.
type BudgetConfig struct {
	// Global caps all teams together; nil: no global cap.
	Global *CapConfig `yaml:"global"`
	// TimeZone is the IANA zone budget periods roll over in; "" is UTC.
	TimeZone string `yaml:"time_zone"`
	// Lease is how long a reservation may stay unsettled before it is
	// charged in full; 0 means 10m.
	Lease Duration `yaml:"lease"`
	// MaxWait is how long a call may queue under rate limits before a
	// 429; absent means 5s, 0s means never wait.
	MaxWait *Duration `yaml:"max_wait"`
	// OutputCaps is, per model, the output tokens reserved for when a
	// request has no max_tokens.
	OutputCaps map[string]Number `yaml:"output_caps"`
	// DefaultOutputCap is the output cap of models not in OutputCaps;
	// absent or 0 means 4096.
	DefaultOutputCap Number `yaml:"default_output_cap"`
	// OutageAllowance, with store.redis, is what each process may spend on
	// a local ledger while Redis is unreachable; nil: fail closed.
	OutageAllowance *CapConfig `yaml:"outage_allowance"`
	// Tokenizers maps models to cl100k_base, o200k_base or r50k_base;
	// other models are counted with a conservative upper bound.
	Tokenizers map[string]string `yaml:"tokenizers"`
}

// CapConfig is a budget: `{usd: 25.00, per: month}`.
type CapConfig struct {
	USD Number `yaml:"usd"`
	Per string `yaml:"per"` // day, week, month or total
}

// LimitsConfig is a rate ceiling; absent or 0 fields are unlimited.
type LimitsConfig struct {
	RequestsPerMinute Number `yaml:"requests_per_minute"`
	TokensPerMinute   Number `yaml:"tokens_per_minute"`
}

// PriceConfig is one model's price in USD per million tokens.
type PriceConfig struct {
	Input       Number `yaml:"input"`
	Output      Number `yaml:"output"`
	CachedInput Number `yaml:"cached_input"` // optional; absent: cached tokens cost input
}

// Number is a YAML number kept for Validate: the decoder never fails on a
// malformed one, so that Validate can name its field as well as its line.
type Number struct {
	Value float64 // the number, when Set and not malformed
	Set   bool    // the key was present
	bad   string  // the malformed text, if it was not a number
}

// UnmarshalYAML records the number, or the text that is not one.
func (n *Number) UnmarshalYAML(node *yaml.Node) error {
	n.Set = true
	if node.Kind != yaml.ScalarNode {
		n.bad = "a list or a map"
		return nil
	}
	v, err := strconv.ParseFloat(strings.TrimSpace(node.Value), 64)
	if err != nil {
		n.bad = strconv.Quote(node.Value)
		return nil
	}
	n.Value = v
	return nil
}

// check reports a malformed, non-finite or negative number.
func (n Number) check() error {
	switch {
	case n.bad != "":
		return fmt.Errorf("%s is not a number", n.bad)
	case math.IsNaN(n.Value) || math.IsInf(n.Value, 0):
		return fmt.Errorf("%v is not a finite number", n.Value)
	case n.Value < 0:
		return fmt.Errorf("%v must not be negative", n.Value)
	}
	return nil
}

// count returns n as a whole, non-negative number.
func (n Number) count() (int64, error) {
	if err := n.check(); err != nil {
		return 0, err
	}
	if n.Value != math.Trunc(n.Value) || n.Value > 1<<53 {
		return 0, fmt.Errorf("%v is not a whole number", n.Value)
	}
	return int64(n.Value), nil
}

// validateSpend checks the budget, price and limit settings; root (may
// be nil) supplies line numbers. Validate calls it.
func (c *Config) validateSpend(root *yaml.Node) error {
	bad := func(err error, path ...any) error {
		return &ConfigError{Field: fieldPath(path), Line: lineOf(root, path), Err: err}
	}
	for _, m := range sortedNames(c.Prices) {
		if m == "" {
			return bad(errors.New("empty model name"), "prices")
		}
		if err := checkPrice(c.Prices[m], bad, "prices", m); err != nil {
			return err
		}
	}
	if c.DefaultPrice != nil {
		if err := checkPrice(*c.DefaultPrice, bad, "default_price"); err != nil {
			return err
		}
	}
	for i, u := range c.Upstreams {
		if strings.ContainsAny(u.Name, "{}") {
			return bad(errors.New("upstream names must not hold '{' or '}'"), "upstreams", i, "name")
		}
		if err := checkLimits(u.Limits, bad, "upstreams", i, "limits"); err != nil {
			return err
		}
	}
	for i, t := range c.Teams {
		if err := checkTeamName(t.Name); err != nil {
			return bad(err, "teams", i, "name")
		}
		if t.Budget != nil {
			if _, err := capOf(*t.Budget, bad, "teams", i, "budget"); err != nil {
				return err
			}
		}
		if err := checkLimits(t.Limits, bad, "teams", i, "limits"); err != nil {
			return err
		}
		ids := map[string]int{}
		for _, k := range t.Keys {
			if h, err := parseKeyHash(k); err == nil {
				ids[guard.KeyID(h)]++
			}
		}
		for _, id := range sortedNames(t.KeyBudgets) {
			switch {
			case len(id) != 12 || strings.ToLower(id) != id || !isHex(id):
				return bad(fmt.Errorf("key id %q must be the first 12 hex digits (lower case) of a key's sha256 listed under keys", id), "teams", i, "key_budgets", id)
			case ids[id] == 0:
				return bad(fmt.Errorf("key id %q matches none of the team's keys (it is the first 12 hex digits after sha256:)", id), "teams", i, "key_budgets", id)
			case ids[id] > 1:
				return bad(fmt.Errorf("key id %q matches two of the team's keys; make a new key for one of them", id), "teams", i, "key_budgets", id)
			}
			if _, err := capOf(t.KeyBudgets[id], bad, "teams", i, "key_budgets", id); err != nil {
				return err
			}
		}
	}
	b := c.Budget
	if b.Global != nil {
		if _, err := capOf(*b.Global, bad, "budget", "global"); err != nil {
			return err
		}
	}
	if b.OutageAllowance != nil {
		if _, err := capOf(*b.OutageAllowance, bad, "budget", "outage_allowance"); err != nil {
			return err
		}
		if c.Store.Redis == nil {
			return bad(errors.New("an outage allowance only applies with store.redis (the embedded ledger has no outage)"), "budget", "outage_allowance")
		}
	}
	if _, err := loadZone(b.TimeZone); err != nil {
		return bad(err, "budget", "time_zone")
	}
	if b.Lease < 0 {
		return bad(errors.New("lease must not be negative"), "budget", "lease")
	}
	if b.MaxWait != nil && *b.MaxWait < 0 {
		return bad(errors.New("max_wait must not be negative"), "budget", "max_wait")
	}
	for _, m := range sortedNames(b.OutputCaps) {
		n, err := b.OutputCaps[m].count()
		if err == nil && n == 0 {
			err = errors.New("an output cap must be positive")
		}
		if err != nil {
			return bad(err, "budget", "output_caps", m)
		}
	}
	if _, err := b.DefaultOutputCap.count(); err != nil {
		return bad(err, "budget", "default_output_cap")
	}
	for _, m := range sortedNames(b.Tokenizers) {
		switch tokens.Encoding(b.Tokenizers[m]) {
		case tokens.Cl100kBase, tokens.O200kBase, tokens.R50kBase:
		default:
			return bad(fmt.Errorf("tokenizer %q: want cl100k_base, o200k_base or r50k_base (or leave the model out for a conservative upper bound)", b.Tokenizers[m]), "budget", "tokenizers", m)
		}
	}
	return nil
}

type badFunc func(err error, path ...any) error

func checkPrice(p PriceConfig, bad badFunc, path ...any) error {
	at := func(f string) []any { return append(append([]any{}, path...), f) }
	for _, f := range []struct {
		name     string
		n        Number
		required bool
	}{{"input", p.Input, true}, {"output", p.Output, true}, {"cached_input", p.CachedInput, false}} {
		if !f.n.Set {
			if f.required {
				return bad(fmt.Errorf("%s is required (USD per million tokens)", f.name), path...)
			}
			continue
		}
		if err := f.n.check(); err != nil {
			return bad(fmt.Errorf("%w (want USD per million tokens)", err), at(f.name)...)
		}
	}
	// The library's own check adds the sanity bound on prices.
	if err := (budget.PriceTable{Default: p.price()}).Validate(); err != nil {
		return bad(err, path...)
	}
	return nil
}

func (p PriceConfig) price() *budget.Price {
	out := &budget.Price{Input: p.Input.Value, Output: p.Output.Value}
	if p.CachedInput.Set {
		v := p.CachedInput.Value
		out.CachedInput = &v
	}
	return out
}

func checkLimits(l *LimitsConfig, bad badFunc, path ...any) error {
	if l == nil {
		return nil
	}
	at := func(f string) []any { return append(append([]any{}, path...), f) }
	if _, err := l.RequestsPerMinute.count(); err != nil {
		return bad(err, at("requests_per_minute")...)
	}
	if _, err := l.TokensPerMinute.count(); err != nil {
		return bad(err, at("tokens_per_minute")...)
	}
	return nil
}

func (l *LimitsConfig) limits() guard.Limits {
	if l == nil {
		return guard.Limits{}
	}
	rpm, _ := l.RequestsPerMinute.count()
	tpm, _ := l.TokensPerMinute.count()
	return guard.Limits{RequestsPerMinute: rpm, TokensPerMinute: tpm}
}

// capOf converts a budget; bad may be nil when the config is known valid.
func capOf(c CapConfig, bad badFunc, path ...any) (*budget.Cap, error) {
	fail := func(err error, field string) error {
		if bad == nil {
			return fmt.Errorf("%s.%s: %w", fieldPath(path), field, err)
		}
		return bad(err, append(append([]any{}, path...), field)...)
	}
	if !c.USD.Set {
		return nil, fail(errors.New("usd is required, e.g. {usd: 25.00, per: month}"), "usd")
	}
	if err := c.USD.check(); err != nil {
		return nil, fail(err, "usd")
	}
	limit, err := budget.FromUSD(c.USD.Value)
	if err != nil {
		return nil, fail(err, "usd")
	}
	p := budget.Period(c.Per)
	if err := p.Validate(); err != nil {
		return nil, fail(fmt.Errorf("per %q: want day, week, month or total", c.Per), "per")
	}
	return &budget.Cap{Limit: limit, Period: p}, nil
}

func loadZone(name string) (*time.Location, error) {
	if name == "" {
		return time.UTC, nil
	}
	loc, err := time.LoadLocation(name)
	if err != nil {
		return nil, fmt.Errorf("time zone %q: %w (want an IANA name such as UTC or Europe/Berlin)", name, err)
	}
	return loc, nil
}

// guardConfig turns a validated Config into the budget guard's settings.
// Every team is listed, with or without a budget; key budgets are keyed by
// guard.KeyID (the first 12 hex digits of the key's sha256). Open the
// ledger with the returned Location.
func guardConfig(cfg Config) (guard.Config, error) {
	loc, err := loadZone(cfg.Budget.TimeZone)
	if err != nil {
		return guard.Config{}, err
	}
	g := guard.Config{
		Prices:     budget.PriceTable{Models: map[string]budget.Price{}},
		Encodings:  map[string]tokens.Encoding{},
		OutputCaps: map[string]int64{},
		Teams:      map[string]guard.TeamPolicy{},
		Upstreams:  map[string]guard.Limits{},
		Lease:      time.Duration(cfg.Budget.Lease),
		Location:   loc,
	}
	for m, p := range cfg.Prices {
		g.Prices.Models[m] = *p.price()
	}
	if cfg.DefaultPrice != nil {
		g.Prices.Default = cfg.DefaultPrice.price()
	}
	for m, e := range cfg.Budget.Tokenizers {
		g.Encodings[m] = tokens.Encoding(e)
	}
	for m, n := range cfg.Budget.OutputCaps {
		if g.OutputCaps[m], err = n.count(); err != nil {
			return guard.Config{}, fmt.Errorf("budget.output_caps.%s: %w", m, err)
		}
	}
	if g.DefaultOutputCap, err = cfg.Budget.DefaultOutputCap.count(); err != nil {
		return guard.Config{}, fmt.Errorf("budget.default_output_cap: %w", err)
	}
	if mw := cfg.Budget.MaxWait; mw != nil {
		g.MaxWait = time.Duration(*mw)
		if g.MaxWait == 0 {
			g.MaxWait = -1 // written 0s: never wait
		}
	}
	if cfg.Budget.Global != nil {
		if g.Global, err = capOf(*cfg.Budget.Global, nil, "budget", "global"); err != nil {
			return guard.Config{}, err
		}
	}
	for i, u := range cfg.Upstreams {
		name := u.Name
		if name == "" {
			name = fmt.Sprintf("upstream-%d", i) // as buildUpstreams names it
		}
		g.Upstreams[name] = u.Limits.limits()
	}
	for i, t := range cfg.Teams {
		pol := guard.TeamPolicy{Limits: t.Limits.limits()}
		if t.Budget != nil {
			if pol.Budget, err = capOf(*t.Budget, nil, "teams", i, "budget"); err != nil {
				return guard.Config{}, err
			}
		}
		for id, kc := range t.KeyBudgets {
			if pol.Keys == nil {
				pol.Keys = map[string]*budget.Cap{}
			}
			if pol.Keys[id], err = capOf(kc, nil, "teams", i, "key_budgets", id); err != nil {
				return guard.Config{}, err
			}
		}
		g.Teams[t.Name] = pol
	}
	return g, nil
}

func isHex(s string) bool {
	_, err := hex.DecodeString(s)
	return err == nil
}

func sortedNames[V any](m map[string]V) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}
