package main

import (
	"context"
	"crypto/tls"
	"errors"
	"fmt"
	"os"
	"strings"
	"time"

	"github.com/redis/go-redis/v9"
	"go.yaml.in/yaml/v3"
)

// StoreConfig is the `store:` section: where state shared between replicas
// lives. Without it everything is in the embedded file under data.
type StoreConfig struct {
	// Redis, when set, holds budgets, spend, rate limits, run journals and
	// (unless Cache is false) cached answers, so that several stint serve
	// processes share them exactly.
	Redis *RedisConfig `yaml:"redis"`
}

// RedisConfig is how to reach Redis or a Redis Cluster.
type RedisConfig struct {
	// Addrs are host:port seeds: one address is a standalone server,
	// several are nodes of a cluster.
	Addrs []string `yaml:"addrs"`
	// Cluster forces cluster mode with a single seed address.
	Cluster bool `yaml:"cluster"`
	// Username is the ACL user; empty: the default user.
	Username string `yaml:"username"`
	// PasswordEnv names the environment variable holding the password;
	// the password itself never goes into the config.
	PasswordEnv string `yaml:"password_env"`
	// DB selects the database of a standalone server.
	DB int `yaml:"db"`
	// Prefix starts every key stint writes; default "stint".
	Prefix string `yaml:"prefix"`
	// Timeout bounds dialing and each command; default 500ms. A request
	// never waits longer than this on a dead Redis.
	Timeout Duration `yaml:"timeout"`
	// TLS connects with TLS (system roots).
	TLS bool `yaml:"tls"`
	// Cache keeps cached answers on Redis, shared by every replica, with
	// misses coalesced across replicas; false keeps them in each
	// replica's embedded file. Default true.
	Cache *bool `yaml:"cache"`
	// HotTTL is the longest an answer from Redis is served from this
	// replica's in-memory tier (cache.hot_bytes) without asking Redis: it
	// bounds how long a replica keeps serving an answer that another one
	// has since refreshed (Cache-Control: no-cache). Default 2s.
	HotTTL Duration `yaml:"hot_ttl"`
	// StaleIfError keeps answers in the in-memory tier past HotTTL (until
	// their cache.ttl, within cache.hot_bytes) and serves them while Redis
	// cannot be read. Default true.
	StaleIfError *bool `yaml:"stale_if_error"`
	// Lease is how long a replica fetching a miss holds the key for the
	// others without renewing it (it renews every third of it while
	// fetching): after a replica dies mid-call, the others wait this long
	// at most before one of them fetches. Default 10s.
	Lease Duration `yaml:"lease"`
}

// Defaults of the store.redis settings.
const (
	// defaultRedisTimeout bounds each Redis command when the config does not.
	defaultRedisTimeout = 500 * time.Millisecond
	// defaultHotTTL is store.redis.hot_ttl's default.
	defaultHotTTL = 2 * time.Second
	// defaultLease is store.redis.lease's default.
	defaultLease = 10 * time.Second
)

// validateStore checks the store section; Validate calls it.
func (c *Config) validateStore(root *yaml.Node) error {
	r := c.Store.Redis
	if r == nil {
		return nil
	}
	bad := func(err error, path ...any) error {
		return &ConfigError{Field: fieldPath(path), Line: lineOf(root, path), Err: err}
	}
	if len(r.Addrs) == 0 {
		return bad(errors.New("give at least one host:port"), "store", "redis", "addrs")
	}
	for i, a := range r.Addrs {
		if _, _, err := splitHostPort(a); err != nil {
			return bad(err, "store", "redis", "addrs", i)
		}
	}
	if r.Timeout < 0 {
		return bad(errors.New("timeout must not be negative"), "store", "redis", "timeout")
	}
	if r.DB < 0 || (r.DB > 0 && (len(r.Addrs) > 1 || r.Cluster)) {
		return bad(errors.New("db must be 0 or more, and 0 on a cluster"), "store", "redis", "db")
	}
	if r.HotTTL < 0 {
		return bad(errors.New("hot_ttl must not be negative (set cache.hot_bytes: 0 for no in-memory tier)"), "store", "redis", "hot_ttl")
	}
	if r.Lease < 0 || (r.Lease > 0 && time.Duration(r.Lease) < 100*time.Millisecond) {
		return bad(errors.New("lease must be at least 100ms"), "store", "redis", "lease")
	}
	if strings.ContainsAny(r.Prefix, "{}") {
		return bad(errors.New("prefix must not hold '{' or '}' (they pick the cluster slot)"), "store", "redis", "prefix")
	}
	return nil
}

func splitHostPort(addr string) (string, string, error) {
	i := strings.LastIndexByte(addr, ':')
	if i <= 0 || i == len(addr)-1 {
		return "", "", fmt.Errorf("address %q must be host:port", addr)
	}
	return addr[:i], addr[i+1:], nil
}

// prefix is the key prefix in use.
func (r *RedisConfig) prefix() string {
	if r.Prefix == "" {
		return "stint"
	}
	return r.Prefix
}

// sharedCache reports whether cached answers live on Redis.
func (r *RedisConfig) sharedCache() bool { return r.Cache == nil || *r.Cache }

// staleIfError reports whether the hot tier stands in for an unreachable
// Redis.
func (r *RedisConfig) staleIfError() bool { return r.StaleIfError == nil || *r.StaleIfError }

// timeout is the bound of one Redis command.
func (r *RedisConfig) timeout() time.Duration {
	if r.Timeout == 0 {
		return defaultRedisTimeout
	}
	return time.Duration(r.Timeout)
}

// hotTTL is the in-memory age bound in front of the shared cache.
func (r *RedisConfig) hotTTL() time.Duration {
	if r.HotTTL == 0 {
		return defaultHotTTL
	}
	return time.Duration(r.HotTTL)
}

// lease is the lease time of a miss being fetched.
func (r *RedisConfig) lease() time.Duration {
	if r.Lease == 0 {
		return defaultLease
	}
	return time.Duration(r.Lease)
}

// client opens a UniversalClient (standalone or cluster) and checks that it
// answers. Every command is bounded by the configured timeout, so a dead
// Redis turns into a quick error rather than a hung request.
func (r *RedisConfig) client(ctx context.Context) (redis.UniversalClient, error) {
	timeout := r.timeout()
	opts := &redis.UniversalOptions{
		Addrs:         r.Addrs,
		IsClusterMode: r.Cluster,
		Username:      r.Username,
		DB:            r.DB,
		DialTimeout:   timeout,
		ReadTimeout:   timeout,
		WriteTimeout:  timeout,
		PoolTimeout:   timeout,
		MaxRetries:    1,
		// Callers' deadlines (the cache store's per-call timeout, a
		// request's own) end a command, not only the socket timeouts.
		ContextTimeoutEnabled: true,
	}
	if r.PasswordEnv != "" {
		opts.Password = os.Getenv(r.PasswordEnv)
	}
	if r.TLS {
		opts.TLSConfig = &tls.Config{MinVersion: tls.VersionTLS12}
	}
	c := redis.NewUniversalClient(opts)
	pctx, cancel := context.WithTimeout(ctx, 4*timeout)
	defer cancel()
	if err := c.Ping(pctx).Err(); err != nil {
		c.Close()
		return nil, fmt.Errorf("redis at %s: %w", strings.Join(r.Addrs, ","), err)
	}
	return c, nil
}
