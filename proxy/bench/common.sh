# Sourced by bench.sh and shared.sh, from the repository root: a scratch
# directory removed on exit together with every process started through the
# helpers below, the stint and benchserver binaries built into it, and the
# helpers that start them. The helpers are not to be called in $(...): a
# subshell would keep the pid from the cleanup list.

work="$(mktemp -d)"
pids=()
cleanup() { for p in "${pids[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true; rm -rf "$work"; }
trap cleanup EXIT

go build -o "$work/stint" ./cmd/stint
go build -o "$work/benchserver" ./proxy/bench/benchserver

# start_bench VAR ARGS...: starts a benchserver and sets VAR to its address.
start_bench() {
	local var="$1" out="$work/$1.addr"; shift
	"$work/benchserver" "$@" >"$out" 2>>"$work/bench.err" & pids+=($!)
	for _ in $(seq 100); do [ -s "$out" ] && break; sleep 0.05; done
	[ -s "$out" ] || { echo "benchserver $* did not start:"; cat "$work/bench.err"; exit 1; }
	printf -v "$var" '%s' "$(cat "$out")"
}

# start_stint VAR NAME ARGS...: starts `stint serve ARGS` logging JSON to
# $work/NAME.log and sets VAR (a name, or an array element like addrs[x])
# to the address it listens on.
start_stint() {
	local var="$1" log="$work/$2.log"; shift 2
	"$work/stint" serve "$@" --log-format json >/dev/null 2>"$log" & pids+=($!)
	for _ in $(seq 200); do grep -q '"addr"' "$log" 2>/dev/null && break; sleep 0.05; done
	local addr; addr="$(sed -n 's/.*"addr":"\([^"]*\)".*/\1/p' "$log" | head -1)"
	[ -n "$addr" ] || { echo "stint serve $* did not start:" >&2; cat "$log" >&2; exit 1; }
	printf -v "$var" '%s' "$addr"
}
