#!/usr/bin/env bash
# Start a throw-away PostgreSQL server on a free 127.0.0.1 port for tests/test_postgres.py and print
# the database URL. Installs Debian's postgresql first when the machine has no server binaries.
set -euo pipefail
port=$(python3 -c "import socket; s = socket.socket(); s.bind(('127.0.0.1', 0)); print(s.getsockname()[1])")
bindir=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1 || true)
if [ -z "$bindir" ] || [ ! -x "$bindir/initdb" ]; then
  apt-get update -q >&2 && DEBIAN_FRONTEND=noninteractive apt-get install -y -q postgresql >&2
  bindir=$(ls -d /usr/lib/postgresql/*/bin | sort -V | tail -n 1)
fi
data=$(mktemp -d /tmp/coldcert-pg.XXXXXX)
chown postgres:postgres "$data"
su postgres -s /bin/sh -c "$bindir/initdb -D $data -A trust -U postgres >/dev/null"
su postgres -s /bin/sh -c "$bindir/pg_ctl -D $data -o '-p $port -k /tmp -h 127.0.0.1' -l $data/log -w start >/dev/null"
su postgres -s /bin/sh -c "$bindir/createuser -h 127.0.0.1 -p $port coldcert && $bindir/createdb -h 127.0.0.1 -p $port -O coldcert coldcert"
echo "postgresql+psycopg://coldcert@127.0.0.1:$port/coldcert"
