package runs

import "sync"

// Cursor hands out, during replays, the occurrence to look up next for each
// request key: Next returns 1, 2, 3, ... for successive calls with the same
// (team, run, session, key). It is in memory, and safe for concurrent use;
// its zero value is ready to use.
//
// Ordering: a run's occurrences are numbered per request key, in the order
// the journal recorded them. Calls with the same key are interchangeable
// (the same request), so when n identical requests are replayed
// concurrently, any assignment of the n recorded answers to them is a valid
// replay; what matters is only that each answer is handed out once, which
// Next guarantees. Calls with different keys are independent, so requests
// that arrive in another order across keys than they were recorded replay
// correctly too. A session separates replays of the same run that should
// each start from occurrence 1 (two replays running side by side, say); use
// one session for one replay.
type Cursor struct {
	// mu guards runs.
	mu sync.Mutex
	// runs maps a (team, run) to its sessions' counters.
	runs map[runID]map[cursorKey]int64
}

type runID struct{ team, run string }

type cursorKey struct{ session, key string }

// Next returns the next occurrence, starting at 1, of key in team's run
// for this session.
func (c *Cursor) Next(team, run, session, key string) int64 {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.runs == nil {
		c.runs = map[runID]map[cursorKey]int64{}
	}
	id := runID{team, run}
	m := c.runs[id]
	if m == nil {
		m = map[cursorKey]int64{}
		c.runs[id] = m
	}
	k := cursorKey{session, key}
	m[k]++
	return m[k]
}

// Reset forgets every session of team's run, so that the next replay of
// any session starts again from occurrence 1. Call it when a replay ends to
// free its counters.
func (c *Cursor) Reset(team, run string) {
	c.mu.Lock()
	defer c.mu.Unlock()
	delete(c.runs, runID{team, run})
}

// Sessions returns, for each replay session of team's run that this
// cursor has served since it was made (or last Reset), how many calls it
// answered; "" is the session of calls that named none.
func (c *Cursor) Sessions(team, run string) map[string]int64 {
	c.mu.Lock()
	defer c.mu.Unlock()
	out := map[string]int64{}
	for k, n := range c.runs[runID{team, run}] {
		out[k.session] += n
	}
	return out
}
