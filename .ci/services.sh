# Start and stop the shared-store test services: PostgreSQL and a NATS server with JetStream,
# on loopback, as non-root processes, in a temporary folder. Source this file, then call
# `services_start` (exports POSTGRES_TEST_URL and NATS_TEST_URL) and `services_stop`.
# Used by .ci/run; developers can use it the same way:
#   source .ci/services.sh && services_start && cargo test && services_stop

SERVICES_DIR=""
PG_PORT="${PG_PORT:-55432}"
NATS_PORT="${NATS_PORT:-54222}"

services_install() {
  local need=()
  ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || need+=(postgresql)
  command -v nats-server >/dev/null || need+=(nats-server)
  if [ ${#need[@]} -gt 0 ]; then
    echo "== installing ${need[*]} (Debian)"
    local sudo=""
    if [ "$(id -u)" != 0 ]; then sudo="sudo"; fi
    $sudo apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq "${need[@]}" >/dev/null
    # Debian's packages start system-wide services; the tests use their own instances.
    $sudo systemctl stop postgresql nats-server >/dev/null 2>&1 || true
  fi
}

# Run a command as the unprivileged `postgres` user when we are root (PostgreSQL refuses
# to run as root), else as ourselves.
as_pg() {
  if [ "$(id -u)" = 0 ]; then runuser -u postgres -- "$@"; else "$@"; fi
}

services_start() {
  services_install
  SERVICES_DIR="$(mktemp -d /tmp/weir-services.XXXXXX)"
  chmod 755 "$SERVICES_DIR"
  local bin
  bin="$(ls -d /usr/lib/postgresql/*/bin | sort -V | tail -1)"
  mkdir -p "$SERVICES_DIR/pg"
  if [ "$(id -u)" = 0 ]; then chown postgres "$SERVICES_DIR/pg"; fi
  as_pg "$bin/initdb" -D "$SERVICES_DIR/pg/data" -A trust -U postgres >/dev/null
  as_pg "$bin/pg_ctl" -D "$SERVICES_DIR/pg/data" -l "$SERVICES_DIR/pg/log" -w \
    -o "-p $PG_PORT -k $SERVICES_DIR/pg -c listen_addresses=127.0.0.1 -c max_connections=200" start >/dev/null
  as_pg "$bin/psql" -h 127.0.0.1 -p "$PG_PORT" -U postgres -q \
    -c "CREATE ROLE weir LOGIN CREATEDB" -c "CREATE DATABASE weir OWNER weir" >/dev/null
  export POSTGRES_TEST_URL="host=127.0.0.1 port=$PG_PORT user=weir dbname=weir"

  mkdir -p "$SERVICES_DIR/nats"
  nats-server -a 127.0.0.1 -p "$NATS_PORT" -js -sd "$SERVICES_DIR/nats" \
    >"$SERVICES_DIR/nats/log" 2>&1 &
  echo $! >"$SERVICES_DIR/nats/pid"
  for _ in $(seq 50); do
    if (exec 3<>"/dev/tcp/127.0.0.1/$NATS_PORT") 2>/dev/null; then break; fi
    sleep 0.1
  done
  export NATS_TEST_URL="nats://127.0.0.1:$NATS_PORT"
  echo "== services: PostgreSQL on 127.0.0.1:$PG_PORT, NATS JetStream on 127.0.0.1:$NATS_PORT ($SERVICES_DIR)"
}

services_stop() {
  [ -n "$SERVICES_DIR" ] || return 0
  local bin
  bin="$(ls -d /usr/lib/postgresql/*/bin | sort -V | tail -1)"
  as_pg "$bin/pg_ctl" -D "$SERVICES_DIR/pg/data" -m fast stop >/dev/null 2>&1 || true
  if [ -f "$SERVICES_DIR/nats/pid" ]; then
    local pid
    pid="$(cat "$SERVICES_DIR/nats/pid")"
    kill "$pid" 2>/dev/null || true
    # Let it finish writing before its folder goes.
    wait "$pid" 2>/dev/null || true
  fi
  rm -rf "$SERVICES_DIR" || true
  SERVICES_DIR=""
}
