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
DURATION="${DURATION:-10s}"
CONNS="${CONNS:-32}"
command -v wrk >/dev/null || { echo "wrk is needed: apt-get install wrk" >&2; exit 1; }

work="$(mktemp -d)"
pids=()
cleanup() { for p in "${pids[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true; rm -rf "$work"; }
trap cleanup EXIT

go build -o "$work/stint" ./cmd/stint
go build -o "$work/benchserver" ./proxy/bench/benchserver

# start_bench VAR ARGS...: starts a benchserver and sets VAR to its address.
# Not called in $(...): a subshell would keep the pid from the cleanup list.
start_bench() {
	local var="$1" out="$work/$1.addr"; shift
	"$work/benchserver" "$@" >"$out" 2>>"$work/bench.err" & pids+=($!)
	for _ in $(seq 100); do [ -s "$out" ] && break; sleep 0.05; done
	[ -s "$out" ] || { echo "benchserver $* did not start:"; cat "$work/bench.err"; exit 1; }
	printf -v "$var" '%s' "$(cat "$out")"
}

start_bench up
start_bench hop --forward "http://$up"
"$work/stint" serve --listen 127.0.0.1:0 --upstream "http://$up/v1" --data "$work/data" --log-format json 2>"$work/stint.log" & pids+=($!)
for _ in $(seq 200); do grep -q '"addr"' "$work/stint.log" 2>/dev/null && break; sleep 0.05; done
proxy="$(sed -n 's/.*"addr":"\([^"]*\)".*/\1/p' "$work/stint.log" | head -1)"
[ -n "$proxy" ] || { echo "stint did not start:"; cat "$work/stint.log"; exit 1; }

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
cat >"$work/miss.lua" <<'LUA'
local n = 0
request = function()
  n = n + 1
  local body = string.format('{"model":"bench-model","prompt":"unique prompt %d %d","temperature":0,"max_tokens":16}', n, math.random(1, 1000000000))
  return wrk.format("POST", "/v1/completions", {["Content-Type"] = "application/json"}, body)
end
LUA

rps() { awk '/Requests\/sec/ {print $2}'; }
p50us() { awk '$1=="50%" {v=$2; if (v ~ /us$/) {sub(/us/,"",v); print v} else if (v ~ /ms$/) {sub(/ms/,"",v); print v*1000} else {sub(/s/,"",v); print v*1000000}}'; }

run() { wrk -t1 -c"$CONNS" -d"$DURATION" --latency -s "$2" "http://$1/v1/completions"; }

echo "== cache hits: $CONNS connections, $DURATION each, one run on $(nproc) cores"
bare_out="$(run "$bare" "$work/hit.lua")"; hit_out="$(run "$proxy" "$work/hit.lua")"
bare_rps="$(echo "$bare_out" | rps)"; hit_rps="$(echo "$hit_out" | rps)"
printf 'bare Go server        %10.0f req/s   p50 %6.0f us\n' "$bare_rps" "$(echo "$bare_out" | p50us)"
printf 'stint serve (hits)    %10.0f req/s   p50 %6.0f us\n' "$hit_rps" "$(echo "$hit_out" | p50us)"
printf 'hit throughput ratio  %10.2f x bare  (target >= 0.80)\n' "$(awk -v a="$hit_rps" -v b="$bare_rps" 'BEGIN {print a / b}')"

echo "== misses: unique prompts, 1 connection (latency without queueing)"
direct_out="$(wrk -t1 -c1 -d"$DURATION" --latency -s "$work/miss.lua" "http://$up/v1/completions")"
hop_out="$(wrk -t1 -c1 -d"$DURATION" --latency -s "$work/miss.lua" "http://$hop/v1/completions")"
miss_out="$(wrk -t1 -c1 -d"$DURATION" --latency -s "$work/miss.lua" "http://$proxy/v1/completions")"
d50="$(echo "$direct_out" | p50us)"; h50="$(echo "$hop_out" | p50us)"; m50="$(echo "$miss_out" | p50us)"
printf 'upstream directly     %10.0f req/s   p50 %6.0f us\n' "$(echo "$direct_out" | rps)" "$d50"
printf 'bare Go forwarder     %10.0f req/s   p50 %6.0f us\n' "$(echo "$hop_out" | rps)" "$h50"
printf 'through stint (miss)  %10.0f req/s   p50 %6.0f us\n' "$(echo "$miss_out" | rps)" "$m50"
printf 'bare hop overhead     %10.0f us at p50  (the floor for a Go proxy here)\n' "$(awk -v a="$h50" -v b="$d50" 'BEGIN {print a - b}')"
printf 'miss-path overhead    %10.0f us at p50  (target <= 150)\n' "$(awk -v a="$m50" -v b="$d50" 'BEGIN {print a - b}')"
printf 'stint beyond the hop  %10.0f us at p50\n' "$(awk -v a="$m50" -v b="$h50" 'BEGIN {print a - b}')"
