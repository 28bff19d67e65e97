#!/usr/bin/env bash
# Hit and miss cost with spend control off and on, measured in one run, and
# their throughput ratios (on / off). Go benchmarks on the embedded store.
set -euo pipefail
cd "$(dirname "$0")/../.."
out="$(go test -run '^$' -bench '^BenchmarkBudgets' -benchtime "${BENCHTIME:-3000x}" ./proxy/)"
echo "$out" | grep '^Benchmark'
echo "$out" | awk '
	/^BenchmarkBudgets/ { name = $1; sub(/-[0-9]+$/, "", name); ns[name] = $3 }
	END {
		split("BenchmarkBudgets/hit BenchmarkBudgets/miss BenchmarkBudgetsParallel/miss", cases, " ")
		for (i = 1; i <= 3; i++) {
			c = cases[i]; off = ns[c "/budgets=off"]; on = ns[c "/budgets=on"]
			if (off > 0 && on > 0) printf "%-32s budgets on / off throughput %.2f x\n", c, off / on
		}
	}'
