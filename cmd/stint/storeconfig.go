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
	// Redis, when set, holds budgets, spend and rate limits, so that
	// several stint serve processes share them exactly.
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
}

// defaultRedisTimeout bounds each Redis command when the config does not.
const defaultRedisTimeout = 500 * time.Millisecond

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

// client opens a UniversalClient (standalone or cluster) and checks that it
// answers. Every command is bounded by the configured timeout, so a dead
// Redis turns into a quick error rather than a hung request.
func (r *RedisConfig) client(ctx context.Context) (redis.UniversalClient, error) {
	timeout := time.Duration(r.Timeout)
	if timeout == 0 {
		timeout = defaultRedisTimeout
	}
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
