package runs

import "time"

// Answer is exactly what the client received for one call.
type Answer struct {
	// Status is the HTTP status: 2xx (not 204, 205, 206), 4xx or 5xx; a
	// streamed answer's is 200.
	Status int
	// ContentType is the Content-Type header: application/json, or
	// text/event-stream for a streamed answer, with at most a
	// charset=utf-8 parameter.
	ContentType string
	// Body is the exact bytes: a JSON body, or the full text/event-stream
	// bytes of a streamed answer. At most MaxBodyBytes.
	Body   []byte
	Stream bool // Body is a text/event-stream
}

// Entry is one call of a run, in arrival order.
type Entry struct {
	Seq        int64  // 1-based position in the run's journal; assigned by Record
	Key        string // the request key, opaque (e.g. hex SHA-256); 1-MaxKeyLen bytes
	Occurrence int64  // 1-based: the n-th call of this run with Key; assigned by Record
	// Ref is the content address (SHA-256, lower-case hex) of the answer
	// body; each distinct body is stored once per run. Set by Record.
	Ref        string
	Outcome    string // cache outcome label, opaque here ("hit", "miss", "bypass", ...)
	Upstream   bool   // the call reached the upstream
	CostNanos  int64  // charged, in nano-USD
	SavedNanos int64  // saved by the cache, in nano-USD
	Model      string
	Stream     bool      // the answer was streamed; Record copies Answer.Stream
	Time       time.Time // when the call arrived; Record fills a zero Time with the current time
}

// Summary describes a whole run. Its figures are the sums over the run's
// entries, so a run and its exported-then-imported copy have equal
// Summaries (Team aside, when imported under another team).
type Summary struct {
	Team        string
	Run         string
	First, Last time.Time // earliest and latest entry Time (UTC)
	Calls       int64     // entries recorded
	Upstream    int64     // entries whose call reached the upstream
	CostNanos   int64     // sum of CostNanos
	SavedNanos  int64     // sum of SavedNanos
	Keys        int64     // distinct request keys
	Bodies      int64     // distinct answer bodies stored
	Bytes       int64     // total size of the distinct bodies
}
