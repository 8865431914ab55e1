#!/usr/bin/env bash
# Start a throwaway PostgreSQL server on loopback for the team-mode tests and benches.
# Installs Debian's postgresql if it is missing. Prints the export line for the DSN.
#   source <(bash .ci/postgres.sh)      # sets KINEMARK_TEST_PG and PGPASSWORD
set -euo pipefail
# a free loopback port unless one is given (another server may hold the usual ones)
PORT="${KINEMARK_PG_PORT:-$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')}"
DATA="${KINEMARK_PG_DATA:-/tmp/kinemark-pg}"
PASS="${KINEMARK_PG_PASSWORD:-kinemark-test-only}"
if ! ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1; then
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq >&2 || true
  apt-get install -y -qq --no-install-recommends postgresql >&2
fi
BIN=$(ls -d /usr/lib/postgresql/*/bin | sort -V | tail -n 1)
RUNAS=()
if [ "$(id -u)" = "0" ]; then RUNAS=(runuser -u postgres --); fi
if [ ! -f "$DATA/PG_VERSION" ]; then
  mkdir -p "$DATA"
  [ "$(id -u)" = "0" ] && chown postgres:postgres "$DATA"
  pwfile=$(mktemp); echo "$PASS" > "$pwfile"; chmod 644 "$pwfile"
  "${RUNAS[@]}" "$BIN/initdb" -D "$DATA" -U kinemark --pwfile="$pwfile" --auth=scram-sha-256 >&2
  rm -f "$pwfile"
fi
if "${RUNAS[@]}" "$BIN/pg_ctl" -D "$DATA" status >/dev/null 2>&1; then
  PORT=$(sed -n 4p "$DATA/postmaster.pid")      # already running: reuse its port
else
  "${RUNAS[@]}" "$BIN/pg_ctl" -D "$DATA" -l "$DATA/server.log" -w \
    -o "-c listen_addresses=127.0.0.1 -p $PORT -k /tmp -c max_connections=60" start >&2 || {
      echo "postgres.sh: the server did not start; its log:" >&2; cat "$DATA/server.log" >&2; exit 1; }
fi
echo "export KINEMARK_TEST_PG='postgresql://kinemark@127.0.0.1:$PORT/postgres'"
echo "export PGPASSWORD='$PASS'"
