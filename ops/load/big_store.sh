#!/usr/bin/env bash
# Resident memory of `weir serve` on a large store: fills a sled store with N invented claims
# through the decide path (examples/store_path, decision times spread over the last two years),
# starts weir serve on it, and samples the server's resident memory while it opens the store,
# runs its start-up monitoring refresh (drift over 30 days, quality and fairness over every
# claim) and takes single-claim load from wrk; prints the peak.
#
#   ops/load/big_store.sh 5000000          # fill (about 40 min on 2 cores) and measure
#   KEEP=/tmp/big ops/load/big_store.sh 5000000   # keep the filled store there; run again to
#                                                 # measure without filling again
#   CACHE_MB=16 KEEP=/tmp/big ops/load/big_store.sh 5000000   # with a smaller sled page cache
#
# Needs wrk (Debian: apt-get install wrk) and about 7 kB of disk per claim.
set -euo pipefail
cd "$(dirname "$0")/../.."
N=${1:-5000000}
DURATION=${DURATION:-30}
PORT=${PORT:-18085}
WORK=${KEEP:-$(mktemp -d /tmp/weir-big.XXXXXX)}
mkdir -p "$WORK"
command -v wrk >/dev/null || { echo "wrk is missing: apt-get install wrk" >&2; exit 1; }
PID=
cleanup() {
  [ -n "$PID" ] && kill "$PID" 2>/dev/null || true
  wait 2>/dev/null || true
  [ -z "${KEEP:-}" ] && rm -rf "$WORK"
}
trap cleanup EXIT

cargo build --release --quiet --bin weir --example store_path
WEIR=target/release/weir
source ops/load/setup.sh
load_setup "$WORK" "$PORT" "cache_mb = ${CACHE_MB:-128}"
if [ ! -f "$WORK/filled-$N" ]; then
  rm -rf "$WORK/store"
  echo "filling $WORK/store with $N claims..."
  target/release/examples/store_path "$WORK/weir.toml" "$N" --spread-days 730
  touch "$WORK/filled-$N"
fi
echo "store on disk: $(du -sh "$WORK/store" | cut -f1)"

rss_mb() { awk '/VmRSS/ {print $2 / 1024}' "/proc/$1/status"; }
$WEIR serve --config "$WORK/weir.toml" >/dev/null 2>"$WORK/serve.log" &
PID=$!
t0=$(date +%s)
for _ in $(seq 600); do
  (exec 3<>"/dev/tcp/127.0.0.1/$PORT") 2>/dev/null && break
  sleep 0.5
done
echo "listening after $(( $(date +%s) - t0 )) s, RSS $(rss_mb "$PID") MB"
# The start-up monitoring refresh runs in the background; sample until it has finished (the
# precision gauge is set by its last step) or two minutes have passed.
for _ in $(seq 240); do
  sleep 0.5
  if curl -s "http://127.0.0.1:$PORT/metrics" | grep -q '^weir_referral_precision_ratio'; then break; fi
done
echo "monitoring refresh done after $(( $(date +%s) - t0 )) s, RSS $(rss_mb "$PID") MB"
LOAD_KEY=$(cat "$WORK/key") RUN_ID="big-$RANDOM" \
  wrk -t2 -c64 -d"${DURATION}s" --latency -s ops/load/single.lua "http://127.0.0.1:$PORT" \
  | awk '/^Requests\/sec/ {print "single-claim intake: " $2 " claims/s"} $1 == "99%" {print "p99 " $2}'
echo "after ${DURATION} s of single-claim load: RSS $(rss_mb "$PID") MB"
echo "peak resident memory of weir serve: $(awk '/VmHWM/ {print $2 / 1024}' "/proc/$PID/status") MB"
echo "claims in the store: $(curl -s "http://127.0.0.1:$PORT/readyz" | sed -E 's/.*"claims":([0-9]+).*/\1/')"
