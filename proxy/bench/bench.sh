#!/usr/bin/env bash
# Measures, in one run on this machine:
#   1. cache-hit throughput of `stint serve` (embedded store) against a bare Go
#      server answering the same bytes from memory, and their ratio;
#   2. miss-path overhead: p50 latency of unique (always-miss) requests through
#      the proxy to a local upstream, minus p50 of the same requests sent to
#      the upstream directly; and, as the floor any Go proxy pays here, the
#      same through a bare forwarding hop (benchserver --forward: no parsing,
#      no cache, net/http's client).
# Needs wrk (apt-get install wrk). Loopback only; every load is bounded in time.
set -euo pipefail
cd "$(dirname "$0")/../.."
DURATION="${DURATION:-5s}"
ROUNDS="${ROUNDS:-5}"
CONNS="${CONNS:-32}"
command -v wrk >/dev/null || { echo "wrk is needed: apt-get install wrk" >&2; exit 1; }

source proxy/bench/common.sh

start_bench up
start_bench hop --forward "http://$up"
start_stint proxy stint --listen 127.0.0.1:0 --upstream "http://$up/v1" --data "$work/data"

hitbody='{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}'
curl -s -o /dev/null "http://$proxy/v1/completions" -H 'Content-Type: application/json' -d "$hitbody"
curl -s -o "$work/hit.json" -D "$work/hit.hdr" "http://$proxy/v1/completions" -H 'Content-Type: application/json' -d "$hitbody"
grep -qi '^stint-cache: hit' "$work/hit.hdr" || { echo "warm-up request was not a hit"; cat "$work/hit.hdr"; exit 1; }
start_bench bare --body "$work/hit.json"

cat >"$work/hit.lua" <<LUA
wrk.method = "POST"
wrk.headers["Content-Type"] = "application/json"
wrk.body = '$hitbody'
LUA
# miss_lua SALT: a wrk script whose every request is new. wrk's math.random
# repeats its sequence from run to run, so each run gets its own salt: a
# prompt sent in an earlier round would be a cache hit.
miss_lua() {
	cat >"$work/miss-$1.lua" <<LUA
local n = 0
request = function()
  n = n + 1
  local body = string.format('{"model":"bench-model","prompt":"unique prompt $1 %d","temperature":0,"max_tokens":16}', n)
  return wrk.format("POST", "/v1/completions", {["Content-Type"] = "application/json"}, body)
end
LUA
	echo "$work/miss-$1.lua"
}

rps() { awk '/Requests\/sec/ {print $2}'; }
p50us() { awk '$1=="50%" {v=$2; if (v ~ /us$/) {sub(/us/,"",v); print v} else if (v ~ /ms$/) {sub(/ms/,"",v); print v*1000} else {sub(/s/,"",v); print v*1000000}}'; }

run() { wrk -t1 -c"$CONNS" -d"$DURATION" --latency -s "$2" "http://$1/v1/completions"; }

median() { sort -g | awk '{v[NR] = $1} END {print (NR % 2) ? v[(NR + 1) / 2] : (v[NR / 2] + v[NR / 2 + 1]) / 2}'; }

# Each round measures both sides of a comparison back to back, so a burst of
# load from elsewhere on a shared machine hits one round, not one side; the
# summary is the median over rounds.
echo "== cache hits: $CONNS connections, $DURATION each, $ROUNDS rounds on $(nproc) cores"
ratios=()
for r in $(seq "$ROUNDS"); do
	bare_out="$(run "$bare" "$work/hit.lua")"; hit_out="$(run "$proxy" "$work/hit.lua")"
	bare_rps="$(echo "$bare_out" | rps)"; hit_rps="$(echo "$hit_out" | rps)"
	ratio="$(awk -v a="$hit_rps" -v b="$bare_rps" 'BEGIN {printf "%.3f", a / b}')"; ratios+=("$ratio")
	printf 'round %d: bare Go server %8.0f req/s (p50 %4.0f us)   stint hits %8.0f req/s (p50 %4.0f us)   %.2fx\n' \
		"$r" "$bare_rps" "$(echo "$bare_out" | p50us)" "$hit_rps" "$(echo "$hit_out" | p50us)" "$ratio"
done
printf 'hit throughput ratio  %6.2f x bare, median of %d rounds  (target >= 0.80)\n' "$(printf '%s\n' "${ratios[@]}" | median)" "$ROUNDS"

# hits_so_far: the proxy's count of requests answered as hits.
hits_so_far() { curl -s "http://$proxy/metrics" | awk '/^stint_requests_total\{/ && /cache="hit"/ {n += $2} END {print n + 0}'; }

echo "== misses: unique prompts, 1 connection (latency without queueing), $ROUNDS rounds"
hits_before="$(hits_so_far)"
hops=(); overheads=(); beyond=()
for r in $(seq "$ROUNDS"); do
	d50="$(wrk -t1 -c1 -d"$DURATION" --latency -s "$(miss_lua "direct-$r")" "http://$up/v1/completions" | p50us)"
	h50="$(wrk -t1 -c1 -d"$DURATION" --latency -s "$(miss_lua "hop-$r")" "http://$hop/v1/completions" | p50us)"
	m50="$(wrk -t1 -c1 -d"$DURATION" --latency -s "$(miss_lua "stint-$r")" "http://$proxy/v1/completions" | p50us)"
	hops+=("$(awk -v a="$h50" -v b="$d50" 'BEGIN {print a - b}')")
	overheads+=("$(awk -v a="$m50" -v b="$d50" 'BEGIN {print a - b}')")
	beyond+=("$(awk -v a="$m50" -v b="$h50" 'BEGIN {print a - b}')")
	printf 'round %d: p50 upstream directly %4.0f us   bare Go forwarder %4.0f us   through stint %4.0f us\n' "$r" "$d50" "$h50" "$m50"
done
hits_after="$(hits_so_far)"
[ "$hits_after" = "$hits_before" ] || { echo "the miss rounds were answered $((hits_after - hits_before)) hits: the figures below are not misses" >&2; exit 1; }
printf 'bare hop overhead     %6.0f us at p50, median  (the floor for a Go proxy here)\n' "$(printf '%s\n' "${hops[@]}" | median)"
printf 'miss-path overhead    %6.0f us at p50, median  (target <= 150)\n' "$(printf '%s\n' "${overheads[@]}" | median)"
printf 'stint beyond the hop  %6.0f us at p50, median\n' "$(printf '%s\n' "${beyond[@]}" | median)"
