package breaker

import "time"

// SetClock replaces the clock the early-probe schedule and the open
// error's time read (gobreaker's own open timer stays on the real clock).
func (b *Breaker) SetClock(now func() time.Time) { b.now = now }
