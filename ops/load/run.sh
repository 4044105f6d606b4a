#!/usr/bin/env bash
# Service load benchmark on loopback: weir serve on a fresh sled folder, driven by wrk for a
# fixed time, single-claim intake and batch intake; then the bare axum ceiling (same JSON
# parsing, nothing else) with the same script; optionally the Python reference service.
# Prints claims/s, p50/p99 latency, server CPU and peak memory, and ratios.
#
#   ops/load/run.sh                 # 20 s per run, 64 connections
#   DURATION=60 CONNECTIONS=64 ops/load/run.sh
#   PYTHON_REFERENCE=1 ops/load/run.sh   # also benches/reference (needs its pip install)
#
# Needs wrk (Debian: apt-get install wrk). Load generator and server share the machine, as
# they would on a developer's machine; state ratios rather than absolute numbers.
set -euo pipefail
cd "$(dirname "$0")/../.."
DURATION=${DURATION:-20}
CONNECTIONS=${CONNECTIONS:-64}
BATCH=${BATCH:-1000}
BATCH_CONNECTIONS=${BATCH_CONNECTIONS:-4}
PORT=${PORT:-18080}
BARE_PORT=${BARE_PORT:-18081}
PY_PORT=${PY_PORT:-18082}
LOAD_DIR=$(pwd)/ops/load
export LOAD_DIR BATCH
command -v wrk >/dev/null || { echo "wrk is missing: apt-get install wrk" >&2; exit 1; }

WORK=$(mktemp -d /tmp/weir-load.XXXXXX)
PIDS=()
cleanup() {
  for p in "${PIDS[@]:-}"; do [ -n "$p" ] && kill "$p" 2>/dev/null || true; done
  wait 2>/dev/null || true
  rm -rf "$WORK"
}
trap cleanup EXIT

cargo build --release --quiet --bin weir --example bare_axum
WEIR=target/release/weir

source "$LOAD_DIR/setup.sh"
load_setup "$WORK" "$PORT"
LOAD_KEY=$(cat "$WORK/key")
export LOAD_KEY

# CPU seconds (user + system) of a process, from /proc.
cpu_seconds() {
  awk -v t="$(getconf CLK_TCK)" '{print ($14 + $15) / t}' "/proc/$1/stat"
}
peak_mb() {
  awk '/VmHWM/ {print $2 / 1024}' "/proc/$1/status"
}
wait_port() {
  for _ in $(seq 100); do
    (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null && return 0
    sleep 0.1
  done
  echo "nothing listening on $1" >&2
  cat "$WORK"/*.log >&2 2>/dev/null || true
  return 1
}

# run NAME PID URL SCRIPT PER_REQUEST [CONNECTIONS]: prints one result line.
run() {
  local name=$1 pid=$2 url=$3 script=$4 per=$5 conns=${6:-$CONNECTIONS}
  local c0 out c1 rps p50 p99 non2xx
  c0=$(cpu_seconds "$pid")
  out=$(RUN_ID="$name-$RANDOM" wrk -t2 -c"$conns" -d"${DURATION}s" --latency -s "$script" "$url")
  c1=$(cpu_seconds "$pid")
  rps=$(awk '/^Requests\/sec/ {print $2}' <<<"$out")
  p50=$(awk '$1 == "50%" {print $2}' <<<"$out")
  p99=$(awk '$1 == "99%" {print $2}' <<<"$out")
  non2xx=$(awk '/Non-2xx/ {print $NF}' <<<"$out")
  printf '%-28s %12.0f claims/s  p50 %8s  p99 %8s  server CPU %5.0f%%  peak RSS %6.0f MB  non-2xx %s\n' \
    "$name" "$(awk -v r="$rps" -v p="$per" 'BEGIN {print r * p}')" "$p50" "$p99" \
    "$(awk -v a="$c0" -v b="$c1" -v d="$DURATION" 'BEGIN {print (b - a) / d * 100}')" \
    "$(peak_mb "$pid")" "${non2xx:-0}"
  echo "$name $(awk -v r="$rps" -v p="$per" 'BEGIN {print r * p}')" >> "$WORK/results"
}

echo "machine: $(nproc) cores, $(awk '/MemTotal/ {printf "%.0f GiB", $2/1048576}' /proc/meminfo); wrk -t2 -d${DURATION}s, $CONNECTIONS connections (batches: $BATCH_CONNECTIONS); $(date -u +%F)"

$WEIR serve --config "$WORK/weir.toml" >/dev/null 2>"$WORK/serve.log" &
WPID=$!; PIDS+=("$WPID")
wait_port "$PORT"
run "weir single (durable)" "$WPID" "http://127.0.0.1:$PORT" "$LOAD_DIR/single.lua" 1
run "weir batch x$BATCH (durable)" "$WPID" "http://127.0.0.1:$PORT" "$LOAD_DIR/batch.lua" "$BATCH" "$BATCH_CONNECTIONS"
CLAIMS=$(curl -s "http://127.0.0.1:$PORT/readyz" | sed -E 's/.*"claims":([0-9]+).*/\1/')
echo "weir store now holds $CLAIMS claims; flushes: $(curl -s "http://127.0.0.1:$PORT/metrics" | awk '/^weir_store_flush_seconds_count/ {print $2}')"
kill "$WPID"; wait "$WPID" 2>/dev/null || true

target/release/examples/bare_axum "127.0.0.1:$BARE_PORT" >/dev/null &
BPID=$!; PIDS+=("$BPID")
wait_port "$BARE_PORT"
run "bare axum single" "$BPID" "http://127.0.0.1:$BARE_PORT" "$LOAD_DIR/single.lua" 1
run "bare axum batch x$BATCH" "$BPID" "http://127.0.0.1:$BARE_PORT" "$LOAD_DIR/batch.lua" "$BATCH" "$BATCH_CONNECTIONS"
kill "$BPID"; wait "$BPID" 2>/dev/null || true

if [ "${PYTHON_REFERENCE:-0}" = 1 ]; then
  python3 benches/reference/service.py --model "$WORK/model.json" --port "$PY_PORT" 2>"$WORK/py.log" &
  PPID_=$!; PIDS+=("$PPID_")
  wait_port "$PY_PORT"
  run "python reference single" "$PPID_" "http://127.0.0.1:$PY_PORT" "$LOAD_DIR/single.lua" 1
  kill "$PPID_"; wait "$PPID_" 2>/dev/null || true
fi

awk '
  {v[$0]=$NF; split($0, a, " "); name=$0; sub(/ [^ ]+$/, "", name); r[name]=$NF}
  END {
    s = r["weir single (durable)"]; bs = r["bare axum single"]
    printf "weir single-claim intake: %.0f%% of the bare axum ceiling\n", 100 * s / bs
    for (k in r) if (k ~ /^weir batch/) wb = r[k]; else if (k ~ /^bare axum batch/) bb = r[k]
    printf "weir batch intake: %.0f%% of the bare axum batch ceiling\n", 100 * wb / bb
    if ("python reference single" in r) printf "weir single-claim intake: %.1f x the Python reference service\n", s / r["python reference single"]
  }' "$WORK/results"
