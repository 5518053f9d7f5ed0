#!/usr/bin/env bash
# pg.sh start|stop DIR PORT - a throwaway PostgreSQL server for the tests.
# Loopback only, trust authentication, data in DIR. Installs Debian's
# postgresql package if it is missing (needs root). Stops only the server
# whose PID it recorded.
set -euo pipefail
cmd=$1 dir=$2 port=${3:-55432}
bin=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1 || true)
as_pg() { if [ "$(id -u)" = 0 ]; then setpriv --reuid=postgres --regid=postgres --init-groups "$@"; else "$@"; fi; }
case "$cmd" in
start)
  if [ -z "$bin" ] || [ ! -x "$bin/pg_ctl" ]; then
    flock /tmp/orbitledger-apt.lock apt-get update -q >/dev/null
    DEBIAN_FRONTEND=noninteractive flock /tmp/orbitledger-apt.lock apt-get install -y -q --no-install-recommends postgresql >/dev/null
    bin=$(ls -d /usr/lib/postgresql/*/bin | sort -V | tail -1)
  fi
  mkdir -p "$dir"
  [ "$(id -u)" = 0 ] && chown postgres:postgres "$dir"
  if [ ! -s "$dir/data/PG_VERSION" ]; then
    as_pg "$bin/initdb" -D "$dir/data" -U postgres --auth=trust -E UTF8 --locale=C.UTF-8 >"$dir/initdb.log"
    cat >>"$dir/data/postgresql.conf" <<CONF
listen_addresses = '127.0.0.1'
port = $port
unix_socket_directories = '$dir'
fsync = off
synchronous_commit = off
full_page_writes = off
max_connections = 200
CONF
  fi
  as_pg "$bin/pg_ctl" -D "$dir/data" -l "$dir/server.log" -w -t 60 start >/dev/null
  head -1 "$dir/data/postmaster.pid" >"$dir/ours.pid"
  echo "postgresql+psycopg://postgres@127.0.0.1:$port/postgres"
  ;;
stop)
  pid=$(cat "$dir/ours.pid" 2>/dev/null || true)
  if [ -n "$pid" ] && [ "$(head -1 "$dir/data/postmaster.pid" 2>/dev/null)" = "$pid" ]; then
    as_pg "$bin/pg_ctl" -D "$dir/data" -m fast -w -t 30 stop >/dev/null || kill -TERM "$pid"
  fi
  rm -f "$dir/ours.pid"
  ;;
*) echo "usage: pg.sh start|stop DIR [PORT]" >&2; exit 2 ;;
esac
