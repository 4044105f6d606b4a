# Shared by the load scripts (sourced, not run): a model, an API key and a weir.toml in a work
# folder. After `load_setup WORK PORT [STORE_LINES]`: $WORK/model.json (logistic regression on
# the demo scenario, which the Python reference service can reproduce exactly), $WORK/keys.toml
# with one claims_system key whose secret is in $WORK/key, and $WORK/weir.toml serving on PORT
# with its store in $WORK/store (STORE_LINES are added to its [store] section). A model and
# key already in WORK are kept.
load_setup() {
  local work=$1 port=$2 store_lines=${3:-}
  local weir=target/release/weir
  if [ ! -f "$work/model.json" ]; then
    $weir demo-data --out "$work/data" --claims 20000 --seed 1 >/dev/null
    printf '[training.trees]\nenabled = false\n' > "$work/train.toml"
    $weir train --data "$work/data/claims.ndjson" --out "$work/model.json" --config "$work/train.toml" >/dev/null
    $weir keys add --file "$work/keys.toml" --name load-intake --role claims_system 2>/dev/null > "$work/key"
  fi
  cat > "$work/weir.toml" <<EOT
[server]
listen = "127.0.0.1:$port"
concurrency_limit = 4096
[store]
path = "$work/store"
$store_lines
[paths]
model = "$work/model.json"
rules = "$(pwd)/config/rules.toml"
[access]
key_file = "$work/keys.toml"
EOT
}
