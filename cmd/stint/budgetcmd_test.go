package main

import (
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
)

// TestPrintStandingsShowsHolds checks `stint budget show`'s table: each
// team's unsettled reservations and the latest time they may be held, and a
// note on what that money is once any team has some.
func TestPrintStandingsShowsHolds(t *testing.T) {
	until := time.Date(2026, 12, 3, 13, 15, 2, 0, time.UTC)
	free := budget.Standing{Team: "depot", Period: budget.Month, LimitUSD: "5.00", SpentUSD: "1.25", HeldUSD: "0.00", LeftUSD: "3.75"}
	held := budget.Standing{Team: "lab", Period: budget.Total, LimitUSD: "0.05", SpentUSD: "0.034", HeldUSD: "0.0009", LeftUSD: "0.0151", Holds: 9, HeldUntil: &until}
	tests := []struct {
		name     string
		in       []budget.Standing
		want     []string // lines, fields separated by single spaces
		wantNote bool
	}{
		{"none", nil, []string{"no team has a budget"}, false},
		{"no holds", []budget.Standing{free}, []string{
			"TEAM PERIOD BUDGET USD SPENT USD HELD USD LEFT USD HOLDS HELD UNTIL",
			"depot month 5.00 1.25 0.00 3.75 0 -",
		}, false},
		{"holds", []budget.Standing{free, held}, []string{
			"TEAM PERIOD BUDGET USD SPENT USD HELD USD LEFT USD HOLDS HELD UNTIL",
			"depot month 5.00 1.25 0.00 3.75 0 -",
			"lab total 0.05 0.034 0.0009 0.0151 9 2026-12-03T13:15:02Z",
		}, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var out strings.Builder
			require.NoError(t, printStandings(&out, tt.in))
			text, note, hasNote := strings.Cut(out.String(), "HELD is reserved")
			var got []string
			for _, line := range strings.Split(strings.TrimSpace(text), "\n") {
				got = append(got, strings.Join(strings.Fields(line), " "))
			}
			assert.Equal(t, tt.want, got)
			assert.Equal(t, tt.wantNote, hasNote, "the note on holds")
			if hasNote {
				assert.Contains(t, note, "charged in full")
			}
		})
	}
}
