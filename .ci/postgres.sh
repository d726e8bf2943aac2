#!/bin/sh
# Start a throw-away PostgreSQL server for the database tests and print the line
# that points the tests at it:
#
#     eval "$(.ci/postgres.sh)"      # sets PASSIVEFIT_TEST_PG_URL
#     .ci/postgres.sh stop           # stops it again
#
# Installs the Debian `postgresql` package when no server binaries are found
# (needs root). Runs the cluster as the `postgres` user when called as root (initdb
# refuses root), otherwise as the calling user. Listens on 127.0.0.1 on a free port;
# trust authentication, local only. Rerunning reuses a running cluster.
# Progress goes to stderr; only the export line goes to stdout.
set -eu

PGDIR="${PASSIVEFIT_PG_DIR:-/tmp/passivefit-pg}"
DBNAME="${PASSIVEFIT_PG_DB:-passivefit_test}"
log() { echo "postgres.sh: $*" >&2; }

find_bindir() {
    if command -v pg_config >/dev/null 2>&1 && [ -x "$(pg_config --bindir)/initdb" ]; then
        pg_config --bindir
        return
    fi
    ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1
}

BINDIR="$(find_bindir)"
if [ -z "$BINDIR" ] || [ ! -x "$BINDIR/initdb" ]; then
    log "installing postgresql (apt-get)"
    apt-get update -qq >&2
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >&2
    BINDIR="$(find_bindir)"
fi

if [ "$(id -u)" = 0 ]; then
    RUNAS="postgres"
    as_owner() { runuser -u postgres -- "$@"; }
else
    RUNAS="$(id -un)"
    as_owner() { "$@"; }
fi

if [ "${1:-}" = "stop" ]; then
    as_owner "$BINDIR/pg_ctl" -D "$PGDIR/data" -m fast stop >&2 || true
    exit 0
fi

mkdir -p "$PGDIR"
[ "$RUNAS" = postgres ] && chown postgres "$PGDIR"

if [ ! -f "$PGDIR/data/PG_VERSION" ]; then
    log "creating a cluster in $PGDIR/data"
    as_owner "$BINDIR/initdb" -D "$PGDIR/data" -U postgres --auth=trust -E UTF8 >&2
fi

if as_owner "$BINDIR/pg_ctl" -D "$PGDIR/data" status >/dev/null 2>&1; then
    PORT="$(cat "$PGDIR/port")"
    log "reusing the server on port $PORT"
else
    PORT="$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')"
    echo "$PORT" > "$PGDIR/port"
    log "starting the server on 127.0.0.1:$PORT"
    as_owner "$BINDIR/pg_ctl" -D "$PGDIR/data" -l "$PGDIR/server.log" -w \
        -o "-p $PORT -k $PGDIR -c listen_addresses=127.0.0.1" start >&2
fi

if ! as_owner "$BINDIR/psql" -h 127.0.0.1 -p "$PORT" -U postgres -tAc \
        "SELECT 1 FROM pg_database WHERE datname = '$DBNAME'" | grep -q 1; then
    as_owner "$BINDIR/createdb" -h 127.0.0.1 -p "$PORT" -U postgres "$DBNAME" >&2
fi

echo "export PASSIVEFIT_TEST_PG_URL=postgresql+psycopg://postgres@127.0.0.1:$PORT/$DBNAME"
