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

	"github.com/stintlab/stint/budget/redisledger"
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
	// SlotRefresh is how often a replica rereads a cluster's slot map
	// while nothing fails; a call that finds its node unreachable, or the
	// cluster changing, has it reread at once. It bounds how long a
	// replica keeps sending a failed-over slot to its dead primary.
	// Default 1s.
	SlotRefresh Duration `yaml:"slot_refresh"`
	// LedgerReplicas is how many replicas of a cluster primary must
	// confirm a budget reservation or settlement (Redis WAIT, for at most
	// half of timeout) before it counts, so that a failover cannot lose
	// one; a reservation no replica confirms is not admitted (503). Only
	// slots whose primary has a replica wait. 0 turns the wait off.
	// Default 1.
	LedgerReplicas *int `yaml:"ledger_replicas"`
}

// Defaults of the store.redis settings.
const (
	// defaultRedisTimeout bounds each Redis command when the config does not.
	defaultRedisTimeout = 500 * time.Millisecond
	// defaultHotTTL is store.redis.hot_ttl's default.
	defaultHotTTL = 2 * time.Second
	// defaultLease is store.redis.lease's default.
	defaultLease = 10 * time.Second
	// defaultSlotRefresh is store.redis.slot_refresh's default.
	defaultSlotRefresh = time.Second
	// defaultLedgerReplicas is store.redis.ledger_replicas's default.
	defaultLedgerReplicas = 1
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
	if r.SlotRefresh < 0 || (r.SlotRefresh > 0 && time.Duration(r.SlotRefresh) < 100*time.Millisecond) {
		return bad(errors.New("slot_refresh must be at least 100ms"), "store", "redis", "slot_refresh")
	}
	if r.LedgerReplicas != nil && *r.LedgerReplicas < 0 {
		return bad(errors.New("ledger_replicas must be 0 or more"), "store", "redis", "ledger_replicas")
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

// slotRefresh is the interval of a cluster client's periodic slot map
// reload.
func (r *RedisConfig) slotRefresh() time.Duration {
	if r.SlotRefresh == 0 {
		return defaultSlotRefresh
	}
	return time.Duration(r.SlotRefresh)
}

// ledgerReplicas is how many replicas confirm a ledger write.
func (r *RedisConfig) ledgerReplicas() int {
	if r.LedgerReplicas == nil {
		return defaultLedgerReplicas
	}
	return *r.LedgerReplicas
}

// ledgerOptions are the shared ledger's options.
func (r *RedisConfig) ledgerOptions(loc *time.Location) redisledger.Options {
	return redisledger.Options{Prefix: r.prefix(), Location: loc, Replicas: r.ledgerReplicas(), ReplicaWait: r.timeout() / 2}
}

// cluster reports whether the config names a cluster.
func (r *RedisConfig) cluster() bool { return r.Cluster || len(r.Addrs) > 1 }

// client opens a UniversalClient (standalone or cluster) and checks that it
// answers. Every command is bounded by the configured timeout, so a dead
// Redis turns into a quick error rather than a hung request.
//
// A cluster client follows a failover with go-redis's own machinery: it
// rereads the slot map every slot_refresh (ClusterStateReloadInterval) and,
// through followFailover, at once after a call finds its node unreachable
// or the cluster changing; MOVED and ASK replies it follows itself. A dial
// is tried once (DialerRetries 1), so a dead primary fails a call at once
// instead of after go-redis's five attempts, and the cluster client's own
// retries take over. ReadOnly stays off: every command goes to the slot's
// primary, since an answer one replica stores must be a hit on the next
// (a replica read can lag behind the write) and the ledger's and leases'
// scripts write.
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
		DialerRetries: 1,
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
	var c redis.UniversalClient
	if r.cluster() {
		co := opts.Cluster()
		co.ClusterStateReloadInterval = r.slotRefresh()
		cc := redis.NewClusterClient(co)
		cc.AddHook(followFailover{cc})
		c = cc
	} else {
		c = redis.NewClient(opts.Simple())
	}
	pctx, cancel := context.WithTimeout(ctx, 4*timeout)
	defer cancel()
	if err := c.Ping(pctx).Err(); err != nil {
		c.Close()
		return nil, fmt.Errorf("redis at %s: %w", strings.Join(r.Addrs, ","), err)
	}
	return c, nil
}

// followFailover is a go-redis hook on a cluster client: after a command or
// pipeline fails because its node could not be reached or answered that
// the cluster is changing, it asks the client to reload its slot map
// (ReloadState, which go-redis runs in the background, one reload at a
// time), so that the client follows a promoted replica as soon as the
// cluster has one rather than at its next periodic reload.
type followFailover struct{ c *redis.ClusterClient }

// DialHook passes dials through.
func (f followFailover) DialHook(next redis.DialHook) redis.DialHook { return next }

// ProcessHook reloads the slot map after a command's topology failure.
func (f followFailover) ProcessHook(next redis.ProcessHook) redis.ProcessHook {
	return func(ctx context.Context, cmd redis.Cmder) error {
		err := next(ctx, cmd)
		if topologyFailure(err) {
			f.c.ReloadState(ctx)
		}
		return err
	}
}

// ProcessPipelineHook reloads the slot map after a pipeline's topology
// failure.
func (f followFailover) ProcessPipelineHook(next redis.ProcessPipelineHook) redis.ProcessPipelineHook {
	return func(ctx context.Context, cmds []redis.Cmder) error {
		err := next(ctx, cmds)
		failed := topologyFailure(err)
		for _, cmd := range cmds {
			failed = failed || topologyFailure(cmd.Err())
		}
		if failed {
			f.c.ReloadState(ctx)
		}
		return err
	}
}

// topologyFailure reports whether err says a node was not reached (a
// network error, a dead connection, a timeout) or the cluster's slots are
// moving (CLUSTERDOWN, TRYAGAIN, MASTERDOWN, READONLY, LOADING, MOVED, ASK),
// as opposed to an answer about the command itself.
func topologyFailure(err error) bool {
	if err == nil || errors.Is(err, redis.Nil) || errors.Is(err, context.Canceled) {
		return false
	}
	var re redis.Error
	if errors.As(err, &re) {
		for _, p := range []string{"CLUSTERDOWN", "TRYAGAIN", "MASTERDOWN", "READONLY", "LOADING", "MOVED", "ASK"} {
			if redis.HasErrorPrefix(err, p) {
				return true
			}
		}
		return false
	}
	return true
}
