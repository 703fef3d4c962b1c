#!/usr/bin/env bash
# Starts a private PostgreSQL server for the test suite (Debian's packages,
# installed when missing), on 127.0.0.1:$METERVEIL_PG_PORT (a free port by default) with trust
# authentication, its data in a fresh temporary folder. Sourced by test-all.sh:
# sets METERVEIL_TEST_POSTGRES to the admin URL and stops the server on exit.
# Also usable alone: `source scripts/test-postgres.sh`, then run the tests with
# METERVEIL_TEST_BACKEND=postgres.

if [ "$(id -u)" = 0 ]; then as_root=""; else as_root="sudo"; fi
pg_bin=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1 || true)
if [ -z "$pg_bin" ] || [ ! -x "$pg_bin/postgres" ]; then
    $as_root apt-get update -q
    DEBIAN_FRONTEND=noninteractive $as_root apt-get install -y -q postgresql
    pg_bin=$(ls -d /usr/lib/postgresql/*/bin | sort -V | tail -1)
fi

# PostgreSQL refuses to run as root: as root, the server runs as the package's
# `postgres` user.
if [ "$(id -u)" = 0 ]; then as_pg="runuser -u postgres --"; else as_pg=""; fi
# A free loopback port unless one is given.
METERVEIL_PG_PORT=${METERVEIL_PG_PORT:-$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')}
pg_dir=$(mktemp -d /tmp/meterveil-pg.XXXXXX)
chmod 755 "$pg_dir"
[ "$(id -u)" = 0 ] && chown postgres "$pg_dir"
$as_pg "$pg_bin/initdb" -D "$pg_dir/data" -U postgres -A trust -E UTF8 --no-locale >"$pg_dir/initdb.log" 2>&1 \
    || { cat "$pg_dir/initdb.log"; exit 1; }
$as_pg "$pg_bin/pg_ctl" -D "$pg_dir/data" -l "$pg_dir/server.log" -w -t 60 \
    -o "-c listen_addresses=127.0.0.1 -p $METERVEIL_PG_PORT -k $pg_dir -c max_connections=300 -c fsync=on" start >/dev/null \
    || { cat "$pg_dir/server.log"; exit 1; }
stop_test_postgres() {
    $as_pg "$pg_bin/pg_ctl" -D "$pg_dir/data" -m fast stop >/dev/null 2>&1 || true
    rm -rf "$pg_dir"
}
trap stop_test_postgres EXIT
export METERVEIL_TEST_POSTGRES="postgres://postgres@127.0.0.1:$METERVEIL_PG_PORT/postgres"
echo "test PostgreSQL server: $("$pg_bin/postgres" --version), $METERVEIL_TEST_POSTGRES"
