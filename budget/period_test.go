package budget_test

import (
	"errors"
	"testing"
	"time"
	_ "time/tzdata" // Europe/Berlin without a system time zone database

	"github.com/stintlab/stint/budget"
)

func TestPeriodBuckets(t *testing.T) {
	utc := time.UTC
	east := time.FixedZone("east", 9*3600) // UTC+9
	tests := []struct {
		p         budget.Period
		t         time.Time
		loc       *time.Location
		want      string
		wantStart time.Time
		wantEnd   time.Time
	}{
		{budget.Day, time.Date(2026, 12, 1, 23, 59, 59, 0, utc), utc, "day:2026-12-01",
			time.Date(2026, 12, 1, 0, 0, 0, 0, utc), time.Date(2026, 12, 2, 0, 0, 0, 0, utc)},
		// 20:00 UTC on Dec 1 is already Dec 2 in UTC+9.
		{budget.Day, time.Date(2026, 12, 1, 20, 0, 0, 0, utc), east, "day:2026-12-02",
			time.Date(2026, 12, 2, 0, 0, 0, 0, east), time.Date(2026, 12, 3, 0, 0, 0, 0, east)},
		{budget.Day, time.Date(2026, 12, 1, 20, 0, 0, 0, utc), nil, "day:2026-12-01",
			time.Date(2026, 12, 1, 0, 0, 0, 0, utc), time.Date(2026, 12, 2, 0, 0, 0, 0, utc)},
		// 2026-12-06 is a Sunday; its week began on Monday 2026-11-30.
		{budget.Week, time.Date(2026, 12, 6, 23, 0, 0, 0, utc), utc, "week:2026-11-30",
			time.Date(2026, 11, 30, 0, 0, 0, 0, utc), time.Date(2026, 12, 7, 0, 0, 0, 0, utc)},
		{budget.Week, time.Date(2026, 12, 7, 0, 0, 0, 0, utc), utc, "week:2026-12-07",
			time.Date(2026, 12, 7, 0, 0, 0, 0, utc), time.Date(2026, 12, 14, 0, 0, 0, 0, utc)},
		// A week across a year end.
		{budget.Week, time.Date(2027, 1, 1, 12, 0, 0, 0, utc), utc, "week:2026-12-28",
			time.Date(2026, 12, 28, 0, 0, 0, 0, utc), time.Date(2027, 1, 4, 0, 0, 0, 0, utc)},
		{budget.Month, time.Date(2028, 2, 29, 12, 0, 0, 0, utc), utc, "month:2028-02",
			time.Date(2028, 2, 1, 0, 0, 0, 0, utc), time.Date(2028, 3, 1, 0, 0, 0, 0, utc)},
		{budget.Month, time.Date(2026, 12, 31, 23, 0, 0, 0, utc), utc, "month:2026-12",
			time.Date(2026, 12, 1, 0, 0, 0, 0, utc), time.Date(2027, 1, 1, 0, 0, 0, 0, utc)},
		{budget.Total, time.Date(2026, 12, 31, 23, 0, 0, 0, utc), utc, "total", time.Time{}, time.Time{}},
	}
	for _, tt := range tests {
		if got := tt.p.Bucket(tt.t, tt.loc); got != tt.want {
			t.Errorf("%s.Bucket(%v, %v) = %q, want %q", tt.p, tt.t, tt.loc, got, tt.want)
		}
		if got := tt.p.Start(tt.t, tt.loc); !got.Equal(tt.wantStart) {
			t.Errorf("%s.Start(%v) = %v, want %v", tt.p, tt.t, got, tt.wantStart)
		}
		if got := tt.p.End(tt.t, tt.loc); !got.Equal(tt.wantEnd) {
			t.Errorf("%s.End(%v) = %v, want %v", tt.p, tt.t, got, tt.wantEnd)
		}
	}
}

// TestPeriodDST checks day and week boundaries fall on local midnight
// across a daylight-saving change (Europe/Berlin, 2026-03-29, from the
// system's time zone database, else the one time/tzdata embeds).
func TestPeriodDST(t *testing.T) {
	berlin, err := time.LoadLocation("Europe/Berlin")
	if err != nil {
		t.Fatalf("no time zone database: %v", err)
	}
	at := time.Date(2026, 3, 29, 12, 0, 0, 0, berlin)
	start, end := budget.Day.Start(at, berlin), budget.Day.End(at, berlin)
	if end.Sub(start) != 23*time.Hour {
		t.Errorf("the DST day runs %v, want 23h", end.Sub(start))
	}
	if got := budget.Week.End(at, berlin); !got.Equal(time.Date(2026, 3, 30, 0, 0, 0, 0, berlin)) {
		t.Errorf("week end = %v, want Monday 2026-03-30 00:00 local", got)
	}
}

func TestPeriodValidate(t *testing.T) {
	for _, p := range []budget.Period{budget.Day, budget.Week, budget.Month, budget.Total} {
		if err := p.Validate(); err != nil {
			t.Errorf("%s.Validate() = %v", p, err)
		}
	}
	for _, p := range []budget.Period{"", "year", "Day"} {
		if err := p.Validate(); !errors.Is(err, budget.ErrBadPeriod) {
			t.Errorf("%q.Validate() = %v, want ErrBadPeriod", p, err)
		}
	}
}
