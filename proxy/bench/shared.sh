#!/usr/bin/env bash
# Cache-hit throughput of `stint serve` on each cache store, in one run:
# the embedded store, Redis and a three-master Redis Cluster (each with the
# replica's in-memory hot tier on, as deployed, and off, so every hit reads
# Redis), against a bare Go server answering the same bytes from memory.
# Then the p99 latency of a hit at half of each setup's measured peak rate,
# with an open-loop load (openload), so queueing shows.
# Needs wrk, redis-server and redis-cli (apt-get install wrk redis-server).
set -euo pipefail
cd "$(dirname "$0")/../.."
DURATION="${DURATION:-8s}"
CONNS="${CONNS:-32}"
for c in wrk redis-server redis-cli; do
	command -v "$c" >/dev/null || { echo "$c is needed: apt-get install wrk redis-server" >&2; exit 1; }
done

source proxy/bench/common.sh
go build -o "$work/openload" ./proxy/bench/openload

# A free port at most 55535: a cluster node also listens 10000 above its port.
free_port() { python3 -c '
import random, socket
while True:
    p = random.randint(20000, 45000)
    try:
        for q in (p, p + 10000):
            socket.socket().bind(("127.0.0.1", q))
        print(p); break
    except OSError:
        pass'; }
start_redis() { # $1 port, rest: extra args
	local port="$1"; shift
	mkdir -p "$work/redis-$port"
	redis-server --port "$port" --bind 127.0.0.1 --save '' --appendonly no --dir "$work/redis-$port" "$@" >"$work/redis-$port.log" 2>&1 & pids+=($!)
	for _ in $(seq 100); do redis-cli -p "$port" ping >/dev/null 2>&1 && return; sleep 0.05; done
	echo "redis-server on $port did not start"; cat "$work/redis-$port.log"; exit 1
}
# stint_with NAME CONFIG: starts stint serve on CONFIG; sets addrs[NAME].
stint_with() { start_stint "addrs[$1]" "stint-$1" --config "$2"; }

start_bench up
standalone="$(free_port)"; start_redis "$standalone"
cluster=()
for _ in 1 2 3; do p="$(free_port)"; start_redis "$p" --cluster-enabled yes --cluster-config-file "$work/nodes-$p.conf"; cluster+=("127.0.0.1:$p"); done
redis-cli --cluster create "${cluster[@]}" --cluster-replicas 0 --cluster-yes >"$work/cluster.log" 2>&1
for _ in $(seq 200); do redis-cli -p "${cluster[0]##*:}" cluster info | grep -q 'cluster_state:ok' && break; sleep 0.05; done

config() { # $1 name, $2 store section, $3 cache section
	cat >"$work/$1.yaml" <<YAML
listen: 127.0.0.1:0
data: $work/data-$1
upstreams:
  - name: bench
    url: http://$up/v1
$3
$2
YAML
	echo "$work/$1.yaml"
}
list() { local IFS=,; echo "$*"; }
declare -A addrs
stint_with embedded "$(config embedded "" "")"
stint_with redis "$(config redis "store: {redis: {addrs: [127.0.0.1:$standalone]}}" "")"
stint_with redis-nohot "$(config redis-nohot "store: {redis: {addrs: [127.0.0.1:$standalone], prefix: nohot}}" "cache: {hot_bytes: 0}")"
stint_with cluster "$(config cluster "store: {redis: {addrs: [$(list "${cluster[@]}")]}}" "")"
stint_with cluster-nohot "$(config cluster-nohot "store: {redis: {addrs: [$(list "${cluster[@]}")], prefix: nohot}}" "cache: {hot_bytes: 0}")"

hitbody='{"model":"bench-model","prompt":"The keepers counted the hives on the third barge","temperature":0,"max_tokens":16}'
printf '%s' "$hitbody" >"$work/hit.body"
setups=(embedded redis redis-nohot cluster cluster-nohot)
for s in "${setups[@]}"; do
	curl -s -o /dev/null "http://${addrs[$s]}/v1/completions" -H 'Content-Type: application/json' -d "$hitbody"
	curl -s -o "$work/hit-$s.json" -D "$work/hit-$s.hdr" "http://${addrs[$s]}/v1/completions" -H 'Content-Type: application/json' -d "$hitbody"
	grep -qi '^stint-cache: hit' "$work/hit-$s.hdr" || { echo "$s: warm-up request was not a hit"; cat "$work/hit-$s.hdr"; exit 1; }
done
start_bench bare --body "$work/hit-embedded.json"

cat >"$work/hit.lua" <<LUA
wrk.method = "POST"
wrk.headers["Content-Type"] = "application/json"
wrk.body = '$hitbody'
LUA
rps() { awk '/Requests\/sec/ {print $2}'; }
run() { wrk -t1 -c"$CONNS" -d"$DURATION" --latency -s "$work/hit.lua" "http://$1/v1/completions"; }

echo "== cache hits by store: $CONNS connections, $DURATION each, one run on $(nproc) cores"
declare -A peak
peak[bare]="$(run "$bare" | rps)"
printf '%-26s %10.0f req/s\n' "bare Go server" "${peak[bare]}"
for s in "${setups[@]}"; do
	peak[$s]="$(run "${addrs[$s]}" | rps)"
	printf '%-26s %10.0f req/s   %.2f x bare   %.2f x embedded\n' "stint serve, $s" "${peak[$s]}" \
		"$(awk -v a="${peak[$s]}" -v b="${peak[bare]}" 'BEGIN {print a / b}')" \
		"$(awk -v a="${peak[$s]}" -v b="${peak[embedded]}" 'BEGIN {print a / b}')"
done

# The open-loop generator is a Go HTTP client on the same two cores and
# costs more CPU per request than wrk, so "half load" is half of the rate
# that generator itself reaches against each setup (asked for twice wrk's
# peak, it sends as fast as it can), not half of wrk's figure.
echo "== p99 of a hit at half of each setup's peak rate with the open-loop generator ($DURATION)"
for s in "${setups[@]}"; do
	url="http://${addrs[$s]}/v1/completions"
	top="$("$work/openload" -url "$url" -body "$work/hit.body" -rate "$(awk -v p="${peak[$s]}" 'BEGIN {print 2 * p}')" -duration 4s | sed -n 's/^rate=\([0-9]*\).*/\1/p')"
	half="$(awk -v p="$top" 'BEGIN {printf "%d", p / 2}')"
	printf '%-14s peak %6d/s, at %6d/s: %s\n' "$s" "$top" "$half" "$("$work/openload" -url "$url" -body "$work/hit.body" -rate "$half" -duration "$DURATION")"
done
