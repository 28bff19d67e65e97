// Package redisledger is the shared budget backend: a budget.Ledger and a
// budget.Journal on Redis or Redis Cluster, so that several stint processes
// share one budget exactly.
//
// Each operation on a team is one Lua script (run with EVALSHA, falling back
// to EVAL), so it is atomic. A team's keys are hash-tagged with its name,
// "stint:{lab}:sums", "stint:{lab}:holds", "stint:{lab}:leases" and
// "stint:{lab}:journal", so every script touches one slot and works on a
// cluster.
//
// Every charge is counted in every period (day, week, month, total) of its
// key's and its team's sums, whatever caps it was checked against, so a
// budget given another period, or set where there was none, finds what was
// already spent in its period (budget.Caps.Holds).
//
// The global cap across teams cannot share a slot with every team, and a
// cluster script cannot touch two slots. It therefore has its own trio of
// keys in the slot "{#global}" ('#' is not allowed in team names, so no team
// can collide with it) and a reservation with a global cap takes two
// scripts: first the global hold, then the team hold. If the team refuses,
// the global hold is released again (compensation). If the process dies
// between the two, or the release fails, the global hold stays until its
// lease expires and is then charged in full like any expired hold: the
// global sum may count money that was never spent, but never less than was
// spent. Settling, and expiry, charge the global hold first and the team's
// second; the same reasoning covers a crash between those two steps. The
// global sums are kept only while a global cap is set (holding there for
// every call would put every team's calls through one slot); the first time
// a process uses a global sum it raises it to at least what the teams' own
// sums of that period add up to (seedGlobal), so a global cap added to the
// config, or given another period, counts what was spent before it. The set
// "stint:{#global}:teams" lists the teams the ledger has seen, for Expire,
// for that sum and for journal scans across teams.
//
// Times go to Redis from the caller (milliseconds); lease deadlines are
// truncated to the millisecond. Replicas' clocks may disagree by some skew
// d without letting a cap be exceeded: every reservation is checked
// against the sums it holds in one script, whatever the time, so what d
// moves is only when things happen, never how much is admitted. A call
// reserved within d of a period's end may count in the neighbouring
// period; a hold may be expired up to d early by a sweeping replica whose
// clock is ahead (charged its whole reservation, never less than the
// call's cost) or settled up to d late at its actual cost. Keep d well
// under budget.lease (NTP keeps it to milliseconds); unlike rate limits
// (redisrate's ServerClock), budgets keep the caller's time so that a
// journal entry's time is the call's. TestClockSkewKeepsCaps runs two
// ledgers an hour apart.
// Durability is Redis's: run it with appendonly for a ledger that survives a
// Redis restart.
//
// # Failover
//
// Redis replicates asynchronously, so a primary that dies can take its
// last acknowledged writes with it, and the replica that takes over never
// had them. A lost reservation would let a call spend money no hold
// covers, and other calls be admitted into its room: an overspend. With
// Options.Replicas on a Redis Cluster, every reservation, settlement and
// release therefore runs its script and then WAIT on the same connection
// to the slot's primary (the node client go-redis's slot map names, see
// run), and counts only once a replica has confirmed it. A reservation
// that no replica confirms in time is refused with a *budget.InDoubtError,
// so the caller releases it and never sends the call; a settlement that no
// replica confirms fails with ErrNotReplicated, and the caller retries it
// (a retry of a settled reservation finds it not held, and writes a marker
// so that its own WAIT confirms the settlement before it). The wait is
// made only while the slot map lists a replica for the slot: a primary
// without one has no replica to lose a write to. What a failover can
// still lose is harmless to budgets: a journal entry (a report line), a
// run-time budget override, a lease sweep (it runs again), a seeded global
// sum (raised again).
package redisledger

import (
	"context"
	"crypto/rand"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/budget"
)

// expireBatch bounds the reservations one expire script charges, so that a
// long backlog never blocks Redis for long.
const expireBatch = 100

// DefaultReplicaWait is Options.ReplicaWait's default.
const DefaultReplicaWait = 250 * time.Millisecond

// ErrNotReplicated reports a ledger write that the primary made but no
// replica confirmed within Options.ReplicaWait, so a failover could lose
// it. Retry a settlement that fails with it.
var ErrNotReplicated = errors.New("redisledger: write not confirmed by a replica")

// Options configure a Ledger. The zero value is usable.
type Options struct {
	// Prefix starts every key. Empty means "stint".
	Prefix string
	// Location is the time zone budget periods follow. Nil means UTC.
	Location *time.Location
	// Replicas is how many replicas must confirm a reservation, a
	// settlement or a release (Redis WAIT) before it counts, on a Redis
	// Cluster whose slot map lists a replica for the team's slot (see the
	// package doc). 0 means none: writes count once the primary has them.
	// Set it to at most the replicas each primary has.
	Replicas int
	// ReplicaWait bounds the wait for the replicas; keep it below the
	// client's read timeout. 0 means DefaultReplicaWait.
	ReplicaWait time.Duration
}

// Ledger is a budget.Ledger and budget.Journal on Redis. It is safe for
// concurrent use, and any number of Ledgers in any number of processes may
// share one Redis (or cluster) with the same Prefix.
type Ledger struct {
	c           redis.UniversalClient
	prefix      string
	loc         *time.Location
	replicas    int
	replicaWait time.Duration

	// guards teams and seeded
	mu sync.Mutex
	// teams this Ledger has already added to the teams set
	teams map[string]bool
	// seeded holds the global sums fields this Ledger has raised to the
	// teams' total (seedGlobal), by field
	seeded map[string]bool
}

var (
	_ budget.Ledger       = (*Ledger)(nil)
	_ budget.Journal      = (*Ledger)(nil)
	_ budget.HoldReporter = (*Ledger)(nil)
)

// New returns a Ledger on c. The caller keeps ownership of c and closes it
// after the Ledger's last use.
func New(c redis.UniversalClient, opts Options) *Ledger {
	p := opts.Prefix
	if p == "" {
		p = "stint"
	}
	loc := opts.Location
	if loc == nil {
		loc = time.UTC
	}
	wait := opts.ReplicaWait
	if wait <= 0 {
		wait = DefaultReplicaWait
	}
	return &Ledger{
		c: c, prefix: p, loc: loc, replicas: max(opts.Replicas, 0), replicaWait: wait,
		teams: map[string]bool{}, seeded: map[string]bool{},
	}
}

// run runs script on keys (one trio, one slot). When the ledger waits for
// replicas and the client is a cluster client whose slot map lists a
// replica for the slot, it sends the script and WAIT in one pipeline over
// one connection of the node client go-redis names as the slot's primary
// (MasterForKey; WAIT confirms the writes of its own connection only, and
// a keyless WAIT in a cluster pipeline would go to a random node). The
// returned error is nil when no wait was due or the replicas confirmed;
// else it wraps ErrNotReplicated, or is the pipeline's error when the
// script's reply is missing. A redirect or an unreachable node asks
// go-redis to reload its slot map (ReloadState) so the next call follows
// the new primary; the error is in the returned command, as with
// Script.Run.
func (l *Ledger) run(ctx context.Context, script *redis.Script, keys []string, args ...any) (*redis.Cmd, error) {
	cc, ok := l.c.(*redis.ClusterClient)
	if !ok || l.replicas == 0 {
		return script.Run(ctx, l.c, keys, args...), nil
	}
	primary, err := cc.MasterForKey(ctx, keys[0])
	if err != nil {
		return script.Run(ctx, l.c, keys, args...), nil
	}
	if replica, err := cc.SlaveForKey(ctx, keys[0]); err != nil || replica.Options().Addr == primary.Options().Addr {
		// No replica in the slot map: nothing a failover could lose the
		// write to.
		return script.Run(ctx, l.c, keys, args...), nil
	}
	send := func(eval func(context.Context, redis.Scripter, []string, ...any) *redis.Cmd) (cmd, wait *redis.Cmd) {
		_, _ = primary.Pipelined(ctx, func(p redis.Pipeliner) error {
			cmd = eval(ctx, p, keys, args...)
			wait = p.Do(ctx, "wait", l.replicas, l.replicaWait.Milliseconds())
			return nil
		})
		return cmd, wait
	}
	cmd, wait := send(script.EvalSha)
	if redis.HasErrorPrefix(cmd.Err(), "NOSCRIPT") {
		// A promoted replica has no script cache of its own.
		cmd, wait = send(script.Eval)
	}
	if err := cmd.Err(); err != nil {
		if !errors.Is(err, redis.Nil) {
			cc.ReloadState(ctx)
			return cmd, nil
		}
	}
	n, err := wait.Int64()
	if err != nil || n < int64(l.replicas) {
		cc.ReloadState(ctx) // a replica may be gone from the map
		return cmd, fmt.Errorf("%w (%d of %d confirmed within %v on %s: %v)", ErrNotReplicated, n, l.replicas, l.replicaWait, primary.Options().Addr, err)
	}
	return cmd, nil
}

// inDoubt reports whether a failed write may still have been made: true
// unless Redis answered with an error (the script failed or never ran) or
// the connection was never opened.
func inDoubt(err error) bool {
	var re redis.Error
	if errors.As(err, &re) && !errors.Is(err, ErrNotReplicated) {
		return false
	}
	var op *net.OpError
	if errors.As(err, &op) && op.Op == "dial" {
		return false
	}
	return !errors.Is(err, redis.ErrPoolTimeout)
}

// trio returns the sums, holds and leases keys of a team ("" for global).
func (l *Ledger) trio(team string) []string {
	tag := l.tag(team)
	return []string{tag + ":sums", tag + ":holds", tag + ":leases"}
}

func (l *Ledger) tag(team string) string {
	if team == "" {
		return l.prefix + ":{#global}"
	}
	return l.prefix + ":{" + team + "}"
}

func (l *Ledger) teamsKey() string { return l.tag("") + ":teams" }

// record is the JSON a holds hash keeps per reservation; the scripts read
// a, d, f and l.
type record struct {
	A   int64              `json:"a"` // amount held
	D   int64              `json:"d"` // lease deadline, Unix ms
	F   []string           `json:"f"` // sums fields held against (budget.Caps.Holds)
	L   []int64            `json:"l"` // the limit of each field; below 0: uncapped
	Res budget.Reservation `json:"r"` // as returned by Reserve
}

// remember adds team to the teams set once per Ledger.
func (l *Ledger) remember(ctx context.Context, team string) error {
	l.mu.Lock()
	known := l.teams[team]
	l.mu.Unlock()
	if known {
		return nil
	}
	if err := l.c.SAdd(ctx, l.teamsKey(), team).Err(); err != nil {
		return err
	}
	l.mu.Lock()
	l.teams[team] = true
	l.mu.Unlock()
	return nil
}

// Reserve implements budget.Ledger.
func (l *Ledger) Reserve(ctx context.Context, now time.Time, req budget.Request) (budget.Reservation, error) {
	if err := req.Validate(); err != nil {
		return budget.Reservation{}, err
	}
	if err := l.remember(ctx, req.Team); err != nil {
		return budget.Reservation{}, fmt.Errorf("redisledger: reserve: %w", err)
	}
	local, global := req.Caps.Holds(req.Team, req.Key, now, l.loc)
	res := budget.Reservation{
		ID: rand.Text(), Team: req.Team, Key: req.Key, Amount: req.Amount, Caps: req.Caps,
		Created: now, Deadline: now.Add(req.Lease).Truncate(time.Millisecond), Remaining: -1,
	}
	if req.Caps.Global != nil {
		if err := l.seedGlobal(ctx, global); err != nil {
			return budget.Reservation{}, err
		}
		rem, err := l.hold(ctx, "", res, global)
		if err != nil {
			return budget.Reservation{}, doubt(res, err)
		}
		res.Remaining = rem
	}
	rem, err := l.hold(ctx, req.Team, res, local)
	if err != nil {
		if req.Caps.Global != nil {
			// Compensate; if this fails too, the global hold is in doubt
			// like an unconfirmed one: released by the caller, or charged
			// in full when it expires (see the package doc).
			cctx := context.WithoutCancel(ctx)
			cmd, rerr := l.run(cctx, releaseScript, l.trio(""), res.ID, now.UnixMilli())
			if rerr = errors.Join(cmd.Err(), rerr); rerr != nil {
				return budget.Reservation{}, &budget.InDoubtError{Reservation: res, Err: errors.Join(err, fmt.Errorf("redisledger: release the global hold: %w", rerr))}
			}
		}
		return budget.Reservation{}, doubt(res, err)
	}
	if rem >= 0 && (res.Remaining < 0 || rem < res.Remaining) {
		res.Remaining = rem
	}
	return res, nil
}

// doubt wraps err in a *budget.InDoubtError for res when the hold may have
// been made.
func doubt(res budget.Reservation, err error) error {
	var ex *budget.ExhaustedError
	if errors.As(err, &ex) || !inDoubt(err) {
		return err
	}
	return &budget.InDoubtError{Reservation: res, Err: err}
}

// seedGlobal raises the global sums of global (the global scope's holds of
// a reservation, one per period) to at least what every team's own sums in
// the same periods add up to, once per field and Ledger. The global sums
// are kept only while a global cap is set (a team's sums always are, in
// its own slot), so a global cap set in the config, or given another
// period, then finds what was spent before it. Spend settled between the
// read of the teams' sums and the raise may be counted twice, never not at
// all.
func (l *Ledger) seedGlobal(ctx context.Context, global []budget.Hold) error {
	l.mu.Lock()
	var todo []budget.Hold
	for _, h := range global {
		if !l.seeded[h.Field] {
			todo = append(todo, h)
		}
	}
	l.mu.Unlock()
	if len(todo) == 0 {
		return nil
	}
	teams, err := l.c.SMembers(ctx, l.teamsKey()).Result()
	if err != nil {
		return fmt.Errorf("redisledger: sum the teams for the global budget: %w", err)
	}
	sums := make([]int64, len(todo))
	pipe := l.c.Pipeline()
	var cmds []*redis.SliceCmd
	for _, team := range teams {
		if budget.ValidateName(team) != nil {
			continue
		}
		fields := make([]string, len(todo))
		for i, h := range todo {
			// The team's field in the same period: the global field with
			// the team scope's prefix ("g|bucket" -> "t:team|bucket").
			_, bucket, _ := strings.Cut(h.Field, "|")
			fields[i] = "s|t:" + team + "|" + bucket
		}
		cmds = append(cmds, pipe.HMGet(ctx, l.trio(team)[0], fields...))
	}
	if len(cmds) > 0 {
		if _, err := pipe.Exec(ctx); err != nil {
			return fmt.Errorf("redisledger: sum the teams for the global budget: %w", err)
		}
	}
	for _, cmd := range cmds {
		vals, err := ints(cmd.Result())
		if err != nil {
			return fmt.Errorf("redisledger: sum the teams for the global budget: %w", err)
		}
		for i, v := range vals {
			sums[i] += v
		}
	}
	args := []any{len(todo)}
	for i, h := range todo {
		args = append(args, h.Field, sums[i])
	}
	if err := seedScript.Run(ctx, l.c, l.trio(""), args...).Err(); err != nil {
		return fmt.Errorf("redisledger: seed the global budget: %w", err)
	}
	l.mu.Lock()
	if len(l.seeded) > 64 {
		l.seeded = map[string]bool{} // old periods' fields are never asked for again
	}
	for _, h := range todo {
		l.seeded[h.Field] = true
	}
	l.mu.Unlock()
	return nil
}

// hold runs the reserve script for res on team's trio ("" for global) and
// returns the least remaining budget, or an *budget.ExhaustedError.
func (l *Ledger) hold(ctx context.Context, team string, res budget.Reservation, holds []budget.Hold) (budget.Nanos, error) {
	rec := record{A: int64(res.Amount), D: res.Deadline.UnixMilli(), F: []string{}, L: []int64{}, Res: res}
	for _, h := range holds {
		rec.F = append(rec.F, h.Field)
		rec.L = append(rec.L, int64(h.Limit))
	}
	raw, err := json.Marshal(rec)
	if err != nil {
		return 0, fmt.Errorf("redisledger: encode reservation: %w", err)
	}
	args := []any{res.ID, int64(res.Amount), rec.D, raw, len(holds)}
	for _, h := range holds {
		args = append(args, h.Field, int64(h.Limit))
	}
	cmd, replicated := l.run(ctx, reserveScript, l.trio(team), args...)
	out, err := ints(cmd.Slice())
	if err != nil {
		return 0, fmt.Errorf("redisledger: reserve: %w", err)
	}
	if out[0] == 1 && len(out) == 2 {
		if replicated != nil {
			return 0, fmt.Errorf("redisledger: reserve: %w", replicated)
		}
		return budget.Nanos(out[1]), nil
	}
	if len(out) != 3 || out[1] < 0 || int(out[1]) >= len(holds) {
		return 0, fmt.Errorf("redisledger: reserve: unexpected script reply %v", out)
	}
	return 0, holds[out[1]].Exhausted(budget.Nanos(out[2]), res.Amount)
}

// Settle implements budget.Ledger. A reservation under a global cap is
// charged on the global sums first and then on the team's: at every moment
// the teams' sums add up to no more than the global ones, which is what
// makes seedGlobal exact. If the global part fails the team's is not
// tried, and both holds are charged in full when their leases expire; if
// the team's part fails after the global one, the team's hold is.
func (l *Ledger) Settle(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos) (budget.Settlement, error) {
	if err := budget.CheckActual(actual); err != nil {
		return budget.Settlement{}, err
	}
	if err := budget.ValidateName(res.Team); err != nil {
		return budget.Settlement{}, err
	}
	globalLeft := budget.Nanos(-1)
	if res.Caps.Global != nil {
		// Both scripts charge the same amount: actual, or the reserved
		// amount at least once the (same) deadline has passed.
		cmd, replicated := l.run(ctx, settleScript, l.trio(""), res.ID, int64(actual), now.UnixMilli())
		g, err := ints(cmd.Slice())
		if err = errors.Join(err, replicated); err != nil {
			return budget.Settlement{}, fmt.Errorf("redisledger: settle the global hold (retry, or it and the team's are charged in full at lease expiry): %w", err)
		}
		if g[0] == 1 && len(g) == 4 {
			globalLeft = budget.Nanos(g[3])
		}
	}
	cmd, replicated := l.run(context.WithoutCancel(ctx), settleScript, l.trio(res.Team), res.ID, int64(actual), now.UnixMilli())
	out, err := ints(cmd.Slice())
	if err = errors.Join(err, replicated); err != nil {
		return budget.Settlement{}, fmt.Errorf("redisledger: settle: %w", err)
	}
	if out[0] == 0 {
		return budget.Settlement{}, budget.ErrNotHeld
	}
	if len(out) != 4 {
		return budget.Settlement{}, fmt.Errorf("redisledger: settle: unexpected script reply %v", out)
	}
	st := budget.Settlement{Charged: budget.Nanos(out[1]), Expired: out[2] == 1, Remaining: budget.Nanos(out[3])}
	st.Released = max(res.Amount-st.Charged, 0)
	if globalLeft >= 0 && (st.Remaining < 0 || globalLeft < st.Remaining) {
		st.Remaining = globalLeft
	}
	return st, nil
}

// Expire implements budget.Ledger. It sweeps the global holds first, then
// every team in the teams set (the order Settle charges in).
func (l *Ledger) Expire(ctx context.Context, now time.Time) ([]budget.Reservation, error) {
	teams, err := l.c.SMembers(ctx, l.teamsKey()).Result()
	if err != nil {
		return nil, fmt.Errorf("redisledger: expire: list teams: %w", err)
	}
	if _, err := l.sweep(ctx, "", now); err != nil {
		return nil, err
	}
	var out []budget.Reservation
	for _, team := range teams {
		if budget.ValidateName(team) != nil {
			continue
		}
		recs, err := l.sweep(ctx, team, now)
		if err != nil {
			return out, err
		}
		for _, r := range recs {
			out = append(out, r.Res)
		}
	}
	return out, nil
}

// sweep runs the expire script on team's trio until no due lease is left.
func (l *Ledger) sweep(ctx context.Context, team string, now time.Time) ([]record, error) {
	var out []record
	for {
		raws, err := expireScript.Run(ctx, l.c, l.trio(team), now.UnixMilli(), expireBatch).StringSlice()
		if err != nil && !errors.Is(err, redis.Nil) {
			return out, fmt.Errorf("redisledger: expire: %w", err)
		}
		for _, raw := range raws {
			var r record
			if err := json.Unmarshal([]byte(raw), &r); err != nil {
				return out, fmt.Errorf("redisledger: expire: decode reservation: %w", err)
			}
			out = append(out, r)
		}
		if len(raws) < expireBatch {
			return out, nil
		}
	}
}

// Balance implements budget.Ledger.
func (l *Ledger) Balance(ctx context.Context, now time.Time, scope budget.Scope, p budget.Period) (budget.Balance, error) {
	if err := budget.ValidateScope(scope); err != nil {
		return budget.Balance{}, err
	}
	if err := p.Validate(); err != nil {
		return budget.Balance{}, fmt.Errorf("%w: %w", budget.ErrInvalid, err)
	}
	f := scope.Field(p, now, l.loc)
	if scope.Team == "" {
		// The global sums may predate the global cap (see seedGlobal).
		if err := l.seedGlobal(ctx, []budget.Hold{{Scope: scope, Period: p, Field: f, Limit: budget.NoLimit}}); err != nil {
			return budget.Balance{}, err
		}
	}
	vals, err := l.c.HMGet(ctx, l.trio(scope.Team)[0], "s|"+f, "h|"+f).Result()
	if err != nil {
		return budget.Balance{}, fmt.Errorf("redisledger: balance: %w", err)
	}
	out, err := ints(vals, nil)
	if err != nil {
		return budget.Balance{}, fmt.Errorf("redisledger: balance: %w", err)
	}
	return budget.Balance{Spent: budget.Nanos(out[0]), Held: budget.Nanos(out[1])}, nil
}

// TeamHolds implements budget.HoldReporter: the team's reservations not
// settled yet and the latest of their lease deadlines.
func (l *Ledger) TeamHolds(ctx context.Context, team string) (budget.Holds, error) {
	if err := budget.ValidateName(team); err != nil {
		return budget.Holds{}, err
	}
	leases := l.trio(team)[2]
	pipe := l.c.Pipeline()
	count := pipe.ZCard(ctx, leases)
	last := pipe.ZRangeWithScores(ctx, leases, -1, -1)
	if _, err := pipe.Exec(ctx); err != nil {
		return budget.Holds{}, fmt.Errorf("redisledger: holds of team %q: %w", team, err)
	}
	h := budget.Holds{Count: int(count.Val())}
	if z := last.Val(); len(z) == 1 {
		h.Until = time.UnixMilli(int64(z[0].Score))
	}
	return h, nil
}

// journalItem makes each sorted-set member unique.
type journalItem struct {
	ID string       `json:"id"` // random, so equal entries stay apart
	E  budget.Entry `json:"e"`  // the entry
}

// Append implements budget.Journal: one ZADD to the team's journal, scored
// by the entry's time in milliseconds.
func (l *Ledger) Append(ctx context.Context, e budget.Entry) error {
	if err := budget.ValidateName(e.Team); err != nil {
		return err
	}
	raw, err := json.Marshal(journalItem{ID: rand.Text(), E: e})
	if err != nil {
		return fmt.Errorf("redisledger: encode journal entry: %w", err)
	}
	if err := l.remember(ctx, e.Team); err != nil {
		return fmt.Errorf("redisledger: append journal entry: %w", err)
	}
	z := redis.Z{Score: float64(e.Time.UnixMilli()), Member: raw}
	if err := l.c.ZAdd(ctx, l.tag(e.Team)+":journal", z).Err(); err != nil {
		return fmt.Errorf("redisledger: append journal entry: %w", err)
	}
	return nil
}

// scanPage is how many journal entries one ZRANGEBYSCORE fetches.
const scanPage = 1000

// Scan implements budget.Journal.
func (l *Ledger) Scan(ctx context.Context, since time.Time, team string, fn func(budget.Entry) error) error {
	teams := []string{team}
	if team == "" {
		var err error
		if teams, err = l.c.SMembers(ctx, l.teamsKey()).Result(); err != nil {
			return fmt.Errorf("redisledger: scan journal: list teams: %w", err)
		}
	}
	for _, t := range teams {
		if budget.ValidateName(t) != nil {
			continue
		}
		for off := int64(0); ; off += scanPage {
			raws, err := l.c.ZRangeByScore(ctx, l.tag(t)+":journal", &redis.ZRangeBy{
				Min: strconv.FormatInt(since.UnixMilli(), 10), Max: "+inf", Offset: off, Count: scanPage,
			}).Result()
			if err != nil {
				return fmt.Errorf("redisledger: scan journal: %w", err)
			}
			for _, raw := range raws {
				var it journalItem
				if err := json.Unmarshal([]byte(raw), &it); err != nil {
					return fmt.Errorf("redisledger: decode journal entry: %w", err)
				}
				if it.E.Time.Before(since) {
					continue
				}
				if err := fn(it.E); err != nil {
					return err
				}
			}
			if len(raws) < scanPage {
				break
			}
		}
	}
	return nil
}

// ints converts a script or HMGET reply to integers; nil counts as 0.
func ints(vals []any, err error) ([]int64, error) {
	if err != nil {
		return nil, err
	}
	if len(vals) == 0 {
		return nil, fmt.Errorf("empty reply")
	}
	out := make([]int64, len(vals))
	for i, v := range vals {
		switch v := v.(type) {
		case nil:
		case int64:
			out[i] = v
		case string:
			n, err := strconv.ParseInt(v, 10, 64)
			if err != nil {
				return nil, fmt.Errorf("reply item %d: %w", i, err)
			}
			out[i] = n
		default:
			return nil, fmt.Errorf("reply item %d has type %T", i, v)
		}
	}
	return out, nil
}
