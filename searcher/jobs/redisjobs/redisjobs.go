// Package redisjobs is the search sidecars' shared job queue on Redis or a
// Redis Cluster, so that several sidecars run one fleet's searches and a
// sidecar's death loses none.
//
// Submissions go into one Redis Stream read by a consumer group: a sidecar
// claims an entry (XREADGROUP), runs its search, and acknowledges it
// (XACK) when the search has ended. While it runs, the sidecar heart-beats
// every second: it resets the entry's idle time (XCLAIM to itself) and
// stores the job's status. An entry idle
// for longer than the lease is taken by another sidecar (XAUTOCLAIM),
// which resumes the search from its last checkpoint. Job state, status,
// checkpoints (zstd-compressed) and outputs live in Redis too, so every
// sidecar answers the job API for every job.
//
// Fencing: each take of a job raises its epoch, and every write of the
// sidecar running it (status, checkpoint, results) names its epoch and
// lands, in one Lua script, only while the job still runs at that epoch.
// A sidecar paused past its lease and resumed finds its writes refused and
// stops; a job finishes at most once, and two sidecars never both write
// it. Every key carries one hash tag, so the scripts work on a Cluster
// (the fleet's keys live in one slot).
package redisjobs

import (
	"bytes"
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/klauspost/compress/zstd"
	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/jobs"
	"github.com/stintlab/stint/searcher/search"
)

// Defaults of Options.
const (
	DefaultLease = 30 * time.Second
	DefaultPoll  = time.Second
	// group is the consumer group every sidecar reads the queue in.
	group = "sidecars"
)

// ErrFenced reports a write of a sidecar that no longer holds the job:
// its lease ran out and another sidecar took it, or it was canceled.
var ErrFenced = errors.New("redisjobs: the job's claim was lost")

// Options configure a Queue. Zero values mean the defaults.
type Options struct {
	// Prefix starts every key; "" means "stint". Keys are
	// "{PREFIX:search}:...".
	Prefix string
	// Name is this sidecar's consumer name in the group and what the API
	// shows as a job's sidecar; "" means HOST-PID-RANDOM.
	Name string
	// Jobs is how many searches this sidecar runs at once; 0 means 1.
	// -1 runs none: the sidecar only answers the API.
	Jobs int
	// Lease is how long a job's claim holds without a heartbeat (one a
	// second, or every third of the lease when shorter) before another
	// sidecar may take the job; 0 means DefaultLease.
	Lease time.Duration
	// Poll is how often an idle worker asks the queue for a job; 0 means
	// DefaultPoll.
	Poll time.Duration
	// Dir holds the output directories of the searches this sidecar runs
	// (their plots stay there; results.json, history.csv and report.md
	// go to Redis too).
	Dir string
	// Proxy is the proxy's base URL and Key the team key of every call.
	Proxy, Key string
	// CheckpointEvery, Price and Backbone are as in jobs.Options.
	CheckpointEvery int
	Price           search.PriceOverride
	Backbone        search.Backbone
	// Log receives a line per job taken, resumed, finished or lost; nil
	// means none.
	Log io.Writer
	// Now is the clock; nil means time.Now.
	Now func() time.Time
}

// Queue is one sidecar's view of the shared queue: it serves the job API
// for every job (jobs.Service) and runs up to Options.Jobs of them. It is
// safe for concurrent use.
type Queue struct {
	rdb   redis.UniversalClient
	model *localmodel.Model
	o     Options
	k     keys

	// enc and dec compress checkpoints and outputs (zstd; EncodeAll and
	// DecodeAll are safe for concurrent use).
	enc *zstd.Encoder
	dec *zstd.Decoder

	logMu sync.Mutex // serializes lines to o.Log

	stop context.CancelFunc
	wg   sync.WaitGroup
}

var _ jobs.Service = (*Queue)(nil)

// keys names the fleet's keys, all under one hash tag.
type keys struct{ tag string }

func (k keys) queue() string         { return k.tag + ":queue" }
func (k keys) jobs() string          { return k.tag + ":jobs" }
func (k keys) job(id string) string  { return k.tag + ":job:" + id }
func (k keys) ckpt(id string) string { return k.tag + ":ckpt:" + id }
func (k keys) out(id string) string  { return k.tag + ":out:" + id }

// Open joins the queue on rdb (creating the stream and group if need be)
// and starts o.Jobs workers; model is the policies' backbone.
func Open(ctx context.Context, rdb redis.UniversalClient, model *localmodel.Model, o Options) (*Queue, error) {
	if o.Prefix == "" {
		o.Prefix = "stint"
	}
	if o.Name == "" {
		host, _ := os.Hostname()
		var b [3]byte
		_, _ = rand.Read(b[:])
		o.Name = fmt.Sprintf("%s-%d-%s", host, os.Getpid(), hex.EncodeToString(b[:]))
	}
	if o.Jobs == 0 {
		o.Jobs = 1
	}
	if o.Lease == 0 {
		o.Lease = DefaultLease
	}
	if o.Poll == 0 {
		o.Poll = DefaultPoll
	}
	if o.Log == nil {
		o.Log = io.Discard
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	enc, err := zstd.NewWriter(nil)
	if err != nil {
		return nil, err
	}
	dec, err := zstd.NewReader(nil)
	if err != nil {
		return nil, err
	}
	q := &Queue{rdb: rdb, model: model, o: o, k: keys{tag: "{" + o.Prefix + ":search}"}, enc: enc, dec: dec}
	if err := q.ensureGroup(ctx); err != nil {
		dec.Close()
		return nil, err
	}
	wctx, stop := context.WithCancel(context.Background())
	q.stop = stop
	for range max(o.Jobs, 0) {
		q.wg.Add(1)
		go q.work(wctx)
	}
	return q, nil
}

// Name is this sidecar's name in the queue.
func (q *Queue) Name() string { return q.o.Name }

// Close stops the workers: each running search is interrupted and handed
// back to the queue, for another sidecar to resume from its checkpoint.
func (q *Queue) Close() {
	q.stop()
	q.wg.Wait()
	q.dec.Close()
}

func (q *Queue) ensureGroup(ctx context.Context) error {
	err := q.rdb.XGroupCreateMkStream(ctx, q.k.queue(), group, "0").Err()
	if err != nil && !strings.HasPrefix(err.Error(), "BUSYGROUP") {
		return fmt.Errorf("redisjobs: create the queue: %w", err)
	}
	return nil
}

func (q *Queue) logf(format string, args ...any) {
	q.logMu.Lock()
	defer q.logMu.Unlock()
	fmt.Fprintf(q.o.Log, "search queue sidecar=%s "+format+"\n", append([]any{q.o.Name}, args...)...)
}

func (q *Queue) nowMS() string { return strconv.FormatInt(q.o.Now().UnixMilli(), 10) }

func unavailable(err error) error { return &jobs.UnavailableError{Err: err} }

// Submit queues a job; its task file must be readable at the same path on
// every sidecar.
func (q *Queue) Submit(ctx context.Context, spec jobs.Spec) (jobs.Status, error) {
	if spec.Task == "" {
		return jobs.Status{}, errors.New("jobs: the spec needs a task file path")
	}
	if _, err := os.Stat(spec.Task); err != nil {
		return jobs.Status{}, fmt.Errorf("jobs: task file: %w", err)
	}
	var b [6]byte
	if _, err := rand.Read(b[:]); err != nil {
		return jobs.Status{}, err
	}
	now := q.o.Now().UTC()
	st := jobs.Status{ID: "job-" + hex.EncodeToString(b[:]), Spec: spec, State: jobs.Queued, DevAcc: -1, LatestDevAcc: -1, Created: now, Updated: now}
	if st.Spec.Run == "" {
		st.Spec.Run = st.ID
	}
	raw, _ := json.Marshal(st)
	err := submitScript.Run(ctx, q.rdb, []string{q.k.queue(), q.k.jobs(), q.k.job(st.ID)},
		st.ID, now.UnixMilli(), raw).Err()
	if err != nil {
		return jobs.Status{}, unavailable(err)
	}
	return st, nil
}

// statusFields are the job hash's fields a status is read from.
var statusFields = []string{"status", "state", "owner", "epoch", "updated"}

// statusOf builds a status from the job hash's statusFields.
func statusOf(id string, v []any) (jobs.Status, error) {
	var st jobs.Status
	raw, ok := v[0].(string)
	if !ok {
		return st, fmt.Errorf("%w: %q", jobs.ErrNotFound, id)
	}
	if err := json.Unmarshal([]byte(raw), &st); err != nil {
		return st, fmt.Errorf("redisjobs: job %s: %w", id, err)
	}
	if s, ok := v[1].(string); ok {
		st.State = s
	}
	if s, ok := v[2].(string); ok {
		st.Sidecar = s
	}
	if s, ok := v[3].(string); ok {
		st.Attempts, _ = strconv.Atoi(s)
	}
	if s, ok := v[4].(string); ok {
		if ms, err := strconv.ParseInt(s, 10, 64); err == nil {
			st.Updated = time.UnixMilli(ms).UTC()
		}
	}
	return st, nil
}

// List returns every job of the fleet, newest first.
func (q *Queue) List(ctx context.Context) ([]jobs.Status, error) {
	ids, err := q.rdb.ZRevRange(ctx, q.k.jobs(), 0, -1).Result()
	if err != nil {
		return nil, unavailable(err)
	}
	cmds := make([]*redis.SliceCmd, len(ids))
	_, err = q.rdb.Pipelined(ctx, func(p redis.Pipeliner) error {
		for i, id := range ids {
			cmds[i] = p.HMGet(ctx, q.k.job(id), statusFields...)
		}
		return nil
	})
	if err != nil {
		return nil, unavailable(err)
	}
	out := make([]jobs.Status, 0, len(ids))
	for i, id := range ids {
		st, err := statusOf(id, cmds[i].Val())
		if errors.Is(err, jobs.ErrNotFound) {
			continue
		}
		if err != nil {
			return nil, err
		}
		out = append(out, st)
	}
	return out, nil
}

// Get returns one job.
func (q *Queue) Get(ctx context.Context, id string) (jobs.Status, error) {
	v, err := q.rdb.HMGet(ctx, q.k.job(id), statusFields...).Result()
	if err != nil {
		return jobs.Status{}, unavailable(err)
	}
	return statusOf(id, v)
}

// Cancel stops a queued or running job for good; the sidecar running it
// stops at its next heartbeat.
func (q *Queue) Cancel(ctx context.Context, id string) (jobs.Status, error) {
	err := cancelScript.Run(ctx, q.rdb, []string{q.k.job(id)}, q.nowMS()).Err()
	if errors.Is(err, redis.Nil) {
		return jobs.Status{}, fmt.Errorf("%w: %q", jobs.ErrNotFound, id)
	}
	if err != nil {
		return jobs.Status{}, unavailable(err)
	}
	return q.Get(ctx, id)
}

// Output returns one of a finished job's files.
func (q *Queue) Output(ctx context.Context, id, name string) ([]byte, error) {
	if _, err := q.Get(ctx, id); err != nil {
		return nil, err
	}
	b, err := q.rdb.HGet(ctx, q.k.out(id), name).Bytes()
	if errors.Is(err, redis.Nil) {
		return nil, fmt.Errorf("%w: job %s has no %s yet", jobs.ErrNoOutput, id, name)
	}
	if err != nil {
		return nil, unavailable(err)
	}
	return q.dec.DecodeAll(b, nil)
}

// History reads the job's curve: its history.csv once finished, else the
// history in its last checkpoint.
func (q *Queue) History(ctx context.Context, id string) (jobs.History, error) {
	h := jobs.History{ID: id, Points: []search.Point{}}
	b, err := q.Output(ctx, id, "history.csv")
	switch {
	case err == nil:
		pts, err := jobs.ParseHistoryCSV(bytes.NewReader(b), "history.csv")
		if err != nil {
			return jobs.History{}, err
		}
		h.Source, h.Points = "history.csv", pts
		return h, nil
	case !errors.Is(err, jobs.ErrNoOutput):
		return jobs.History{}, err
	}
	c, err := q.rdb.HGet(ctx, q.k.ckpt(id), "data").Bytes()
	if errors.Is(err, redis.Nil) {
		return h, nil
	}
	if err != nil {
		return jobs.History{}, unavailable(err)
	}
	raw, err := q.dec.DecodeAll(c, nil)
	if err != nil {
		return jobs.History{}, fmt.Errorf("redisjobs: job %s's checkpoint: %w", id, err)
	}
	pts, err := jobs.ParseCheckpointHistory(bytes.NewReader(raw), search.CheckpointFile)
	if err != nil {
		return jobs.History{}, err
	}
	h.Source, h.Points = search.CheckpointFile, pts
	return h, nil
}

// sleep waits d or until ctx ends, reporting whether ctx is still live.
func sleep(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}

// work takes jobs and runs them one at a time until ctx ends.
func (q *Queue) work(ctx context.Context) {
	defer q.wg.Done()
	failing := false
	for ctx.Err() == nil {
		c, err := q.claim(ctx)
		switch {
		case err != nil && ctx.Err() == nil:
			if !failing {
				q.logf("cannot read the queue, retrying every %s: %v", q.o.Poll, err)
			}
			failing = true
			sleep(ctx, q.o.Poll)
			continue
		case err != nil:
			return
		}
		if failing {
			q.logf("reading the queue again")
			failing = false
		}
		if c == nil {
			sleep(ctx, q.o.Poll)
			continue
		}
		q.run(ctx, c)
	}
}

// claim is a job this sidecar took.
type claim struct {
	id, entry string
	epoch     int64
	resume    bool
	status    jobs.Status
}

// claim takes a job: first one whose claim ran past its lease, then a new
// one. It returns nil when there is none.
func (q *Queue) claim(ctx context.Context) (*claim, error) {
	// XAUTOCLAIM looks at ten pending entries per count asked for: go on
	// from its cursor until it has scanned them all.
	var msgs []redis.XMessage
	for cursor := "0-0"; ; {
		var err error
		msgs, cursor, err = q.rdb.XAutoClaim(ctx, &redis.XAutoClaimArgs{Stream: q.k.queue(), Group: group, Consumer: q.o.Name,
			MinIdle: q.o.Lease, Start: cursor, Count: 1}).Result()
		if err != nil && strings.HasPrefix(err.Error(), "NOGROUP") {
			return nil, q.ensureGroup(ctx)
		}
		if err != nil {
			return nil, err
		}
		if len(msgs) > 0 || cursor == "0-0" {
			break
		}
	}
	if len(msgs) == 0 {
		streams, err := q.rdb.XReadGroup(ctx, &redis.XReadGroupArgs{Group: group, Consumer: q.o.Name,
			Streams: []string{q.k.queue(), ">"}, Count: 1, Block: -1}).Result()
		if errors.Is(err, redis.Nil) {
			return nil, nil
		}
		if err != nil && strings.HasPrefix(err.Error(), "NOGROUP") {
			return nil, q.ensureGroup(ctx)
		}
		if err != nil {
			return nil, err
		}
		for _, s := range streams {
			msgs = append(msgs, s.Messages...)
		}
	}
	if len(msgs) == 0 {
		return nil, nil
	}
	msg := msgs[0]
	id, _ := msg.Values["id"].(string)
	epoch, err := takeScript.Run(ctx, q.rdb, []string{q.k.queue(), q.k.job(id)}, group, q.o.Name, msg.ID, q.nowMS()).Int64()
	if err != nil {
		return nil, err
	}
	if epoch == 0 {
		return nil, nil // an ended job's entry, now dropped
	}
	st, err := q.Get(ctx, id)
	if err != nil {
		return nil, err
	}
	n, err := q.rdb.HExists(ctx, q.k.ckpt(id), "data").Result()
	if err != nil {
		return nil, err
	}
	return &claim{id: id, entry: msg.ID, epoch: epoch, resume: n, status: st}, nil
}

// running is the state of one job this sidecar runs.
type running struct {
	mu     sync.Mutex // guards status
	status jobs.Status
}

func (r *running) update(fn func(*jobs.Status)) {
	r.mu.Lock()
	defer r.mu.Unlock()
	fn(&r.status)
}

func (r *running) snapshot() []byte {
	r.mu.Lock()
	defer r.mu.Unlock()
	b, _ := json.Marshal(r.status)
	return b
}

// run runs a claimed job until it ends, its claim is lost, it is
// canceled, or ctx ends (then it goes back to the queue).
func (q *Queue) run(ctx context.Context, c *claim) {
	jctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st := c.status
	st.State, st.Sidecar, st.Attempts, st.Error = jobs.Running, q.o.Name, int(c.epoch), ""
	r := &running{status: st}
	if c.resume {
		q.logf("job=%s taken attempt=%d resuming from its checkpoint", c.id, c.epoch)
	} else {
		q.logf("job=%s taken attempt=%d", c.id, c.epoch)
	}

	var beatMu sync.Mutex // guards outcome
	outcome := ""
	beatDone := make(chan struct{})
	go func() {
		defer close(beatDone)
		q.heartbeat(jctx, c, r, func(o string) {
			beatMu.Lock()
			outcome = o
			beatMu.Unlock()
			cancel()
		})
	}()

	out := filepath.Join(q.o.Dir, "jobs", c.id, "out")
	job := search.Job{TaskPath: st.Spec.Task, Proxy: q.o.Proxy, Key: q.o.Key, Run: st.Spec.Run, Out: out,
		Resume: c.resume, OverCap: st.Spec.OverCap, CheckpointEvery: q.o.CheckpointEvery, Price: q.o.Price, Backbone: q.o.Backbone,
		Checkpoints: checkpoints{q: q, ctx: jctx, c: c}}
	oc, err := search.RunJob(jctx, q.model, job, io.Discard, func(p search.Progress) {
		r.update(func(s *jobs.Status) { s.Track(p) })
	})
	cancel()
	<-beatDone
	beatMu.Lock()
	lost := outcome
	beatMu.Unlock()
	// The end is retried for a while, past the queue's closing; a hand-back
	// only briefly (the lease hands the job on anyway).
	bg, stop := context.WithTimeout(context.WithoutCancel(ctx), 4*q.o.Lease)
	defer stop()
	if lost == "" && errors.Is(err, ErrFenced) {
		// A checkpoint was refused: canceled (the heartbeat then
		// acknowledges the entry) or taken by another sidecar.
		lost = "lost"
		if res, err := q.beat(bg, c, nil); err == nil && res == "canceled" {
			lost = res
		}
	}
	switch {
	case lost == "canceled":
		q.logf("job=%s canceled", c.id)
	case lost != "":
		q.logf("job=%s lost its claim: another sidecar runs it", c.id)
	case ctx.Err() != nil:
		rctx, cancel := context.WithTimeout(bg, min(q.o.Lease, 5*time.Second))
		defer cancel()
		q.release(rctx, c, r)
	case err != nil:
		r.update(func(s *jobs.Status) { s.State, s.Error = jobs.Failed, err.Error() })
		q.finish(bg, c, r, jobs.Failed, "")
	default:
		r.update(func(s *jobs.Status) {
			s.State, s.Phase = jobs.Done, ""
			res := oc.Results
			s.Calls, s.CacheShare, s.SpentUSD = res.Spending.Calls, res.Spending.CacheShare(), res.Spending.CostUSD
			s.FlooredShare = res.FlooredShare()
		})
		q.finish(bg, c, r, jobs.Done, out)
	}
}

// heartbeat extends the job's claim and stores its status every second
// (every third of the lease when that is shorter) until ctx ends, and calls end with "canceled" or "lost" when
// the job was canceled or taken by another sidecar. While Redis cannot be
// reached the search goes on; its claim holds as long as its entry's idle
// time is under the lease when Redis answers again.
func (q *Queue) heartbeat(ctx context.Context, c *claim, r *running, end func(string)) {
	every := min(q.o.Lease/3, time.Second)
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		bctx, cancel := context.WithTimeout(ctx, every)
		res, err := q.beat(bctx, c, r.snapshot())
		cancel()
		if err == nil && res != "ok" {
			end(res)
			return
		}
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// beat runs the heartbeat script once, storing status unless nil.
func (q *Queue) beat(ctx context.Context, c *claim, status []byte) (string, error) {
	return heartbeatScript.Run(ctx, q.rdb, []string{q.k.queue(), q.k.job(c.id)},
		group, q.o.Name, c.entry, c.epoch, status, q.nowMS()).Text()
}

// retry runs fn until it succeeds, fails with ErrFenced, or ctx ends,
// waiting a little longer each time Redis fails.
func (q *Queue) retry(ctx context.Context, what string, fn func(context.Context) error) error {
	wait := 50 * time.Millisecond
	for tries := 0; ; tries++ {
		err := fn(ctx)
		if err == nil || errors.Is(err, ErrFenced) || errors.Is(err, redis.Nil) {
			return err
		}
		if tries == 0 {
			q.logf("%s: %v; retrying", what, err)
		}
		if !sleep(ctx, wait) {
			return fmt.Errorf("redisjobs: %s: %w", what, err)
		}
		wait = min(2*wait, time.Second)
	}
}

// finish stores the job's end at its epoch, with the outputs in dir ("":
// none).
func (q *Queue) finish(ctx context.Context, c *claim, r *running, state, dir string) {
	args := []any{group, c.entry, c.epoch, state, r.snapshot(), q.nowMS()}
	if dir != "" {
		for _, name := range jobs.Outputs {
			b, err := os.ReadFile(filepath.Join(dir, name))
			if err != nil {
				q.logf("job=%s: %v", c.id, err)
				continue
			}
			args = append(args, name, q.enc.EncodeAll(b, nil))
		}
	}
	err := q.retry(ctx, "job="+c.id+" store the end", func(ctx context.Context) error {
		n, err := finishScript.Run(ctx, q.rdb, []string{q.k.queue(), q.k.job(c.id), q.k.out(c.id), q.k.ckpt(c.id)}, args...).Int()
		if err == nil && n == 0 {
			return ErrFenced
		}
		return err
	})
	switch {
	case errors.Is(err, ErrFenced):
		q.logf("job=%s lost its claim before it could store its end: another sidecar runs it", c.id)
	case err != nil:
		q.logf("job=%s: %v; it will be taken again after its lease", c.id, err)
	default:
		q.logf("job=%s %s", c.id, state)
	}
}

// release hands the job back to the queue.
func (q *Queue) release(ctx context.Context, c *claim, r *running) {
	r.update(func(s *jobs.Status) { s.State = jobs.Queued })
	err := q.retry(ctx, "job="+c.id+" hand back", func(ctx context.Context) error {
		return releaseScript.Run(ctx, q.rdb, []string{q.k.queue(), q.k.job(c.id)}, group, c.entry, c.epoch, r.snapshot(), q.nowMS(), c.id).Err()
	})
	if err != nil {
		q.logf("job=%s: %v; it will be taken again after its lease", c.id, err)
		return
	}
	q.logf("job=%s handed back to the queue", c.id)
}

// checkpoints keep a running job's checkpoints in Redis, fenced by its
// epoch (search.Checkpoints).
type checkpoints struct {
	q   *Queue
	ctx context.Context // the job's: a save gives up when the job ends
	c   *claim
}

// Save stores st compressed, retrying while Redis is unreachable; it
// fails with ErrFenced once another sidecar has taken the job.
func (k checkpoints) Save(st *search.State) error {
	var b bytes.Buffer
	if err := search.WriteState(&b, st); err != nil {
		return err
	}
	data := k.q.enc.EncodeAll(b.Bytes(), nil)
	return k.q.retry(k.ctx, "job="+k.c.id+" checkpoint", func(ctx context.Context) error {
		n, err := checkpointScript.Run(ctx, k.q.rdb, []string{k.q.k.job(k.c.id), k.q.k.ckpt(k.c.id)}, k.c.epoch, data, st.Step).Int()
		if err == nil && n == 0 {
			return ErrFenced
		}
		return err
	})
}

// Load returns the last checkpoint stored, retrying while Redis is
// unreachable.
func (k checkpoints) Load() (io.Reader, error) {
	var b []byte
	err := k.q.retry(k.ctx, "job="+k.c.id+" read the checkpoint", func(ctx context.Context) error {
		var err error
		b, err = k.q.rdb.HGet(ctx, k.q.k.ckpt(k.c.id), "data").Bytes()
		return err
	})
	if errors.Is(err, redis.Nil) {
		return nil, fmt.Errorf("redisjobs: job %s: %w", k.c.id, os.ErrNotExist)
	}
	if err != nil {
		return nil, fmt.Errorf("redisjobs: job %s's checkpoint: %w", k.c.id, err)
	}
	raw, err := k.q.dec.DecodeAll(b, nil)
	if err != nil {
		return nil, fmt.Errorf("redisjobs: job %s's checkpoint: %w", k.c.id, err)
	}
	return bytes.NewReader(raw), nil
}
