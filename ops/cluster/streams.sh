#!/usr/bin/env bash
# Create weir's streams replicated three times, before the first weir instance starts (weir
# creates missing streams itself, but with one replica: right for one NATS server, wrong for
# a cluster). Uses the `nats` command-line client; names and subjects are weir's defaults
# (config/weir.toml, [stream]).
set -euo pipefail
S="${NATS_URL:-nats://127.0.0.1:4222}"
nats -s "$S" stream add weir-claims --subjects weir.claims.filed --retention work \
  --storage file --replicas 3 --discard old --max-age 14d --dupe-window 2m --defaults
nats -s "$S" stream add weir-decisions --subjects weir.decisions --retention limits \
  --storage file --replicas 3 --max-age 30d --dupe-window 2m --defaults
nats -s "$S" stream add weir-undecidable --subjects weir.claims.undecidable --retention limits \
  --storage file --replicas 3 --max-age 90d --defaults
