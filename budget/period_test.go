package budget_test

import (
	"testing"
	"time"
	_ "time/tzdata" // Europe/Berlin without a system time zone database

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

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
		assert.Equal(t, tt.want, tt.p.Bucket(tt.t, tt.loc), "%s.Bucket(%v, %v)", tt.p, tt.t, tt.loc)
		assert.WithinDuration(t, tt.wantStart, tt.p.Start(tt.t, tt.loc), 0, "%s.Start(%v)", tt.p, tt.t)
		assert.WithinDuration(t, tt.wantEnd, tt.p.End(tt.t, tt.loc), 0, "%s.End(%v)", tt.p, tt.t)
	}
}

// TestPeriodDST checks day and week boundaries fall on local midnight
// across a daylight-saving change (Europe/Berlin, 2026-03-29, from the
// system's time zone database, else the one time/tzdata embeds).
func TestPeriodDST(t *testing.T) {
	berlin, err := time.LoadLocation("Europe/Berlin")
	require.NoError(t, err, "no time zone database")
	at := time.Date(2026, 3, 29, 12, 0, 0, 0, berlin)
	start, end := budget.Day.Start(at, berlin), budget.Day.End(at, berlin)
	assert.Equal(t, 23*time.Hour, end.Sub(start), "the DST day's length")
	assert.WithinDuration(t, time.Date(2026, 3, 30, 0, 0, 0, 0, berlin), budget.Week.End(at, berlin), 0, "week end: Monday 2026-03-30 00:00 local")
}

func TestPeriodValidate(t *testing.T) {
	for _, p := range []budget.Period{budget.Day, budget.Week, budget.Month, budget.Total} {
		assert.NoError(t, p.Validate(), "%s.Validate() =", p)
	}
	for _, p := range []budget.Period{"", "year", "Day"} {
		assert.ErrorIs(t, p.Validate(), budget.ErrBadPeriod, "%q.Validate() =", p)
	}
}
