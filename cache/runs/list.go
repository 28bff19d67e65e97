package runs

import (
	"cmp"
	"slices"
)

// sortSummaries orders runs as List returns them: latest Last first, ties
// by run id.
func sortSummaries(list []Summary) {
	slices.SortFunc(list, func(a, b Summary) int {
		if c := b.Last.Compare(a.Last); c != 0 {
			return c
		}
		return cmp.Compare(a.Run, b.Run)
	})
}
