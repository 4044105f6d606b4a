#!/usr/bin/env bash
# The generalisation table of the README: each invented world trained on, and its model scored
# on its own held-out later part and on the other world's later part (which it was never
# shaped on). Writes into ${OUT:-/tmp/weir-generalisation}; prints both training summaries.
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=${OUT:-/tmp/weir-generalisation}
N=${CLAIMS:-10000}
mkdir -p "$OUT"
cargo build --release --quiet
W=target/release/weir
$W demo-data --out "$OUT/fernlow" --claims "$N" --seed 1 >/dev/null
$W demo-data --out "$OUT/osterby" --claims "$N" --seed 1 --world osterby >/dev/null
for pair in "fernlow osterby" "osterby fernlow"; do
  set -- $pair
  echo "== trained on $1, also evaluated on $2"
  $W train --data "$OUT/$1/claims.ndjson" --out "$OUT/model-$1.json" \
    --report "$OUT/report-$1.json" --config config/weir.toml \
    --also-evaluate "$OUT/$2/claims.ndjson" --truth "$OUT/$2/truth.csv"
done
