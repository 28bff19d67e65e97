// Package redisrate is a ratelimit.Limiter shared by every process on one
// Redis or Redis Cluster: the Generic Cell Rate Algorithm (GCRA) run as one
// Lua script per request.
//
// GCRA keeps a single number per key, the theoretical arrival time (TAT):
// the time at which the key's traffic so far would have been sent had it
// been spaced exactly one emission interval T apart. A request for n units
// at time now moves it to TAT' = max(TAT, now) + n·T and conforms when
// TAT' − now ≤ τ, the tolerance, here τ = Burst·T. A request that does not
// conform may instead wait TAT' − τ − now (queueing) if that is within the
// caller's maximum; otherwise nothing is changed and the wait is returned
// as the retry-after time. It follows that over any window W at most
// Burst + floor(W/T) units are admitted.
//
// Keys are "stint:{KEY}:gcra" so a key (normally a team name, or an
// upstream's name for the shared ceiling) lives in one cluster slot. Times
// are microseconds. With Options.ServerClock they are Redis's own (the
// script reads TIME), so replicas whose clocks disagree share one clock:
// a replica whose clock ran ahead by d would otherwise see every TAT up to
// d in its past and admit up to d/T units more than the bound. Without
// it they are the caller's now, which tests inject.
//
// A Redis Cluster failover can lose a key's last TAT updates (replication
// is asynchronous): the promoted replica then admits the units those
// requests took once more, so a window may let through up to that many
// extra units. That bends a rate ceiling for a moment but costs no money
// no budget covers (budgets are redisledger's, which waits for replicas),
// so the limiter does not wait for replicas; while a key's primary cannot
// be reached, Reserve fails and the caller refuses the call.
package redisrate

import (
	"context"
	"fmt"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/budget/ratelimit"
)

// gcraScript runs one GCRA decision.
//
//	KEYS[1] the TAT (microseconds, as a decimal integer)
//	ARGV: now_us, interval_us, burst, n, max_wait_us, server_clock
//	("1": now is Redis's TIME instead of now_us)
//	returns {1, wait_us} if admitted (TAT updated), {0, wait_us} if the
//	wait would exceed max_wait_us (nothing changed).
//
// Times are below 2^53 µs (year 2255), exact in Lua's doubles; the TAT is
// written back with string.format('%d') for the same reason as in
// redisledger. The key expires a minute after the TAT passes, when it is
// no longer needed (an absent key means TAT = now).
var gcraScript = redis.NewScript(`
local now = tonumber(ARGV[1])
if ARGV[6] == '1' then
  if redis.replicate_commands then redis.replicate_commands() end
  local t = redis.call('TIME')
  now = tonumber(t[1]) * 1000000 + tonumber(t[2])
end
local T = tonumber(ARGV[2])
local tau = tonumber(ARGV[3]) * T
local n = tonumber(ARGV[4])
local tat = tonumber(redis.call('GET', KEYS[1])) or now
if tat < now then tat = now end
local newtat = tat + n * T
local wait = newtat - tau - now
if wait < 0 then wait = 0 end
if wait > tonumber(ARGV[5]) then
  return {0, wait}
end
redis.call('SET', KEYS[1], string.format('%d', newtat), 'PX', math.ceil((newtat - now) / 1000) + 60000)
return {1, wait}
`)

// Options configure a Limiter. The zero value is usable.
type Options struct {
	// Prefix starts every key. Empty means "stint".
	Prefix string
	// ServerClock makes every decision on Redis's clock (TIME) instead of
	// the now passed to Reserve: the setting for several replicas, whose
	// clocks may disagree. False uses the caller's now.
	ServerClock bool
}

// Limiter is a GCRA ratelimit.Limiter on Redis. It is safe for concurrent
// use by any number of processes sharing the Redis.
type Limiter struct {
	c           redis.UniversalClient
	prefix      string
	serverClock string // "1" with Options.ServerClock, else "0"
}

var _ ratelimit.Limiter = (*Limiter)(nil)

// New returns a Limiter on c; the caller keeps ownership of c.
func New(c redis.UniversalClient, opts Options) *Limiter {
	p := opts.Prefix
	if p == "" {
		p = "stint"
	}
	l := &Limiter{c: c, prefix: p, serverClock: "0"}
	if opts.ServerClock {
		l.serverClock = "1"
	}
	return l
}

// Reserve implements ratelimit.Limiter; with Options.ServerClock it
// ignores now. Key must not contain '{' or '}'.
// Each key keeps one TAT, so give each dimension its own key: for example
// "lab:rpm" for a team's requests and "lab:tpm" for its tokens.
func (l *Limiter) Reserve(ctx context.Context, now time.Time, key string, lim ratelimit.Limit, n int64, maxWait time.Duration) (time.Duration, error) {
	if err := lim.Validate(); err != nil {
		return 0, err
	}
	if n < 0 {
		return 0, fmt.Errorf("%w: negative count %d", ratelimit.ErrBadLimit, n)
	}
	if n > lim.BurstSize() {
		return 0, fmt.Errorf("%w: %d units, burst %d", ratelimit.ErrTooLarge, n, lim.BurstSize())
	}
	for _, c := range key {
		if c == '{' || c == '}' {
			return 0, fmt.Errorf("%w: key %q holds a brace", ratelimit.ErrBadLimit, key)
		}
	}
	iv := lim.Interval().Microseconds()
	out, err := gcraScript.Run(ctx, l.c, []string{l.prefix + ":{" + key + "}:gcra"},
		now.UnixMicro(), iv, lim.BurstSize(), n, max(maxWait, 0).Microseconds(), l.serverClock).Int64Slice()
	if err != nil {
		return 0, fmt.Errorf("redisrate: %w", err)
	}
	if len(out) != 2 {
		return 0, fmt.Errorf("redisrate: unexpected script reply %v", out)
	}
	wait := time.Duration(out[1]) * time.Microsecond
	if out[0] == 0 {
		return 0, &ratelimit.LimitedError{RetryAfter: wait}
	}
	return wait, nil
}
