package proxy_test

import (
	"encoding/json"
	"net/http"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
)

// Integers a double cannot hold exactly. RFC 8785 §3.2.2.3 writes a number
// as the IEEE-754 double nearest to it (its Appendix B gives 2^53, bit
// pattern 4340000000000000, as "9007199254740992"), so 9007199254740993
// canonicalizes to the same text as 2^53, and int64's largest value and its
// predecessor both to "9223372036854776000". An upstream that reads
// integers exactly (as Python's json does, and the wire format's int64
// seed) takes them as different seeds.
var wideIntegerPairs = [][2]string{
	{"9007199254740992", "9007199254740993"},
	{"-9007199254740992", "-9007199254740993"},
	{"9223372036854775807", "9223372036854775806"},
}

// TestIntegersBeyondDoublesGetTheirOwnEntries: a seed past 2^53 is not
// served another seed's answer; each one is fetched once and then hit.
func TestIntegersBeyondDoublesGetTheirOwnEntries(t *testing.T) {
	for _, pair := range wideIntegerPairs {
		t.Run(pair[0]+" vs "+pair[1], func(t *testing.T) {
			r := newRig(t)
			for round, want := range []string{proxy.OutcomeMiss, proxy.OutcomeHit} {
				for _, seed := range pair {
					got := r.complete(greedy("the seed picks the barge", "seed", json.Number(seed)))
					require.Equal(t, http.StatusOK, got.status, "round %d seed %s: %s", round, seed, got.body)
					assert.Equal(t, want, got.cache(), "round %d seed %s", round, seed)
				}
			}
			assert.Equal(t, 2, r.upstreamGenerations(), "one upstream call per distinct seed")
		})
	}
}

// TestReplayTellsWideIntegersApart: a run that recorded one seed past 2^53
// does not replay that answer for its neighbour.
func TestReplayTellsWideIntegersApart(t *testing.T) {
	for _, pair := range wideIntegerPairs {
		t.Run(pair[0]+" vs "+pair[1], func(t *testing.T) {
			r := newRunRig(t)
			body := func(seed string) map[string]any {
				return sampled("the seed picks the barge", "seed", json.Number(seed))
			}
			got := r.complete(body(pair[0]), proxy.HeaderRun, "seeds-1")
			require.Equal(t, http.StatusOK, got.status, "record: %s", got.body)

			got = r.complete(body(pair[0]), proxy.HeaderRun, "seeds-1", proxy.HeaderRunMode, "replay")
			assert.Equal(t, http.StatusOK, got.status, "replay of the recorded seed: %s", got.body)
			got = r.complete(body(pair[1]), proxy.HeaderRun, "seeds-1", proxy.HeaderRunMode, "replay")
			assert.Equal(t, http.StatusConflict, got.status, "replay of the other seed: %s", got.body)
			assert.Equal(t, "replay_miss", errorCode(t, got.body))
		})
	}
}
