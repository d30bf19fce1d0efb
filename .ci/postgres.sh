#!/usr/bin/env bash
# A throwaway PostgreSQL server for the engine tests, on 127.0.0.1 only.
#
#   .ci/postgres.sh          start (or reuse) the server; prints its DSN on the last line
#   .ci/postgres.sh stop     stop it and remove its folder
#
# The cluster lives in $DKA_PG_DIR (default: $TMPDIR/dka-cohort-pg-$UID). Running it twice with the
# same folder reuses the running server (idempotent). Debian's postgresql is installed when no
# initdb is found and we are root. Trust authentication, fsync off: for tests only, never data.
set -euo pipefail

dir="${DKA_PG_DIR:-${TMPDIR:-/tmp}/dka-cohort-pg-$(id -u)}"
action="${1:-start}"

find_bin() {
  local candidate
  for candidate in /usr/lib/postgresql/*/bin; do
    [ -x "$candidate/initdb" ] && echo "$candidate"
  done | sort -V | tail -n 1
}

bindir="$(find_bin || true)"
if [ -z "$bindir" ] && command -v initdb >/dev/null 2>&1; then
  bindir="$(dirname "$(readlink -f "$(command -v initdb)")")"
fi

as_owner() {
  # initdb and postgres refuse to run as root: run them as the `postgres` system user then.
  if [ "$(id -u)" = "0" ]; then
    runuser -u postgres -- "$@"
  else
    "$@"
  fi
}

# where the cluster's files are: $dir/data, or (root, and the `postgres` user cannot reach $dir,
# e.g. under pytest's private tmp folders) a folder of its own named in $dir/datadir
datadir() {
  if [ -f "$dir/datadir" ]; then cat "$dir/datadir"; else echo "$dir/data"; fi
}

if [ "$action" = "stop" ]; then
  data="$(datadir)"
  if [ -n "$bindir" ] && [ -f "$data/postmaster.pid" ]; then
    as_owner "$bindir/pg_ctl" -D "$data" -m fast -w stop >/dev/null 2>&1 || true
  fi
  if [ "$data" != "$dir/data" ]; then rm -rf "$(dirname "$data")"; fi
  rm -rf "$dir"
  echo "postgres: stopped ($dir)" >&2
  exit 0
fi

if [ -z "$bindir" ]; then
  if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
    echo "postgres: installing Debian's postgresql" >&2
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq >&2 || true
    apt-get install -y -qq --no-install-recommends postgresql >/dev/null
    # Debian starts a cluster of its own on install; this script does not use it
    bindir="$(find_bin)"
  else
    echo "postgres: no initdb found and cannot install (not root or no apt-get)" >&2
    exit 2
  fi
fi

# reuse a running server of this folder
if [ -f "$dir/port" ] && [ -f "$(datadir)/postmaster.pid" ]; then
  port="$(cat "$dir/port")"
  if "$bindir/pg_isready" -q -h 127.0.0.1 -p "$port" >/dev/null 2>&1; then
    echo "postgresql://postgres@127.0.0.1:${port}/postgres"
    exit 0
  fi
fi

if [ -f "$dir/datadir" ]; then rm -rf "$(dirname "$(cat "$dir/datadir")")"; fi
rm -rf "$dir"
mkdir -p "$dir"
data="$dir/data"
if [ "$(id -u)" = "0" ]; then
  chown postgres: "$dir"
  if ! runuser -u postgres -- test -w "$dir"; then
    own="$(mktemp -d "${TMPDIR:-/tmp}/dka-cohort-pg-data.XXXXXX")"
    chown postgres: "$own"
    data="$own/data"
    echo "$data" > "$dir/datadir"
  fi
fi
chmod 700 "$dir"
sock="$(dirname "$data")"

port="$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1]); s.close()')"
echo "$port" > "$dir/port"

as_owner "$bindir/initdb" -D "$data" -U postgres --auth=trust --encoding=UTF8 --locale=C.UTF-8 \
  >"$dir/initdb.log" 2>&1 || { cat "$dir/initdb.log" >&2; exit 1; }
as_owner "$bindir/pg_ctl" -D "$data" -l "$data/server.log" -w -t 60 \
  -o "-c listen_addresses=127.0.0.1 -p $port -k $sock -c fsync=off -c synchronous_commit=off -c full_page_writes=off -c timezone=UTC -c max_connections=20 -c shared_buffers=128MB -c work_mem=64MB" \
  start >/dev/null || { cat "$data/server.log" >&2; exit 1; }
echo "postgresql://postgres@127.0.0.1:${port}/postgres"
