package budget

import (
	"errors"
	"fmt"
	"time"
)

// Period is how often a budget starts over. Periods follow the calendar in
// the ledger's time zone: a day starts at local midnight, a week at local
// midnight on Monday (ISO 8601 weeks), a month at local midnight on its
// first day. Total never starts over.
type Period string

// The budget periods accepted in configuration.
const (
	Day   Period = "day"
	Week  Period = "week"
	Month Period = "month"
	Total Period = "total"
)

// ErrBadPeriod reports a period other than day, week, month or total.
var ErrBadPeriod = errors.New("budget: bad period (want day, week, month or total)")

// Validate reports whether p is one of the known periods.
func (p Period) Validate() error {
	switch p {
	case Day, Week, Month, Total:
		return nil
	}
	return fmt.Errorf("%w: %q", ErrBadPeriod, string(p))
}

// Start returns the start of the period that contains t, in loc (nil means
// UTC). For Total it returns the zero time.
func (p Period) Start(t time.Time, loc *time.Location) time.Time {
	if loc == nil {
		loc = time.UTC
	}
	t = t.In(loc)
	y, m, d := t.Date()
	switch p {
	case Day:
		return time.Date(y, m, d, 0, 0, 0, 0, loc)
	case Week:
		back := (int(t.Weekday()) + 6) % 7 // days since Monday
		return time.Date(y, m, d-back, 0, 0, 0, 0, loc)
	case Month:
		return time.Date(y, m, 1, 0, 0, 0, 0, loc)
	}
	return time.Time{}
}

// End returns the end (exclusive) of the period that contains t, in loc (nil
// means UTC): the start of the next period. For Total it returns the zero
// time, meaning never.
func (p Period) End(t time.Time, loc *time.Location) time.Time {
	s := p.Start(t, loc)
	y, m, d := s.Date()
	switch p {
	case Day:
		return time.Date(y, m, d+1, 0, 0, 0, 0, s.Location())
	case Week:
		return time.Date(y, m, d+7, 0, 0, 0, 0, s.Location())
	case Month:
		return time.Date(y, m+1, 1, 0, 0, 0, 0, s.Location())
	}
	return time.Time{}
}

// Bucket names the period that contains t, in loc (nil means UTC): for
// example "day:2026-12-01", "week:2026-11-30" (the Monday), "month:2026-12"
// or "total". Ledgers keep one running sum per scope and bucket.
func (p Period) Bucket(t time.Time, loc *time.Location) string {
	s := p.Start(t, loc)
	switch p {
	case Day, Week:
		return string(p) + ":" + s.Format("2006-01-02")
	case Month:
		return string(p) + ":" + s.Format("2006-01")
	}
	return string(Total)
}
