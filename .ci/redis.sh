#!/usr/bin/env bash
# Start a throw-away Redis server on a free 127.0.0.1 port for the distributed-queue tests and
# print its URL. Installs Debian's redis-server first when the machine has none.
#
# The server keeps an append-only file with fsync on every write, so a broker restarted while
# jobs are queued comes back with them (the tests restart it). Stop it with
#   redis-cli -u URL shutdown nosave
# `.ci/redis.sh restart URL` restarts the server of URL on the same port and data folder;
# `.ci/redis.sh start URL DIR` starts a stopped one again (DIR: its `config get dir`).
set -euo pipefail
if ! command -v redis-server >/dev/null 2>&1; then
  apt-get update -q >&2 && DEBIAN_FRONTEND=noninteractive apt-get install -y -q redis-server >&2
fi

start() {  # start PORT DIR
  redis-server --bind 127.0.0.1 --port "$1" --dir "$2" --daemonize yes \
    --pidfile "$2/redis.pid" --logfile "$2/redis.log" --save "" \
    --appendonly yes --appendfsync always --protected-mode yes >&2
  for _ in $(seq 100); do
    if redis-cli -h 127.0.0.1 -p "$1" ping 2>/dev/null | grep -q PONG; then
      return 0
    fi
    sleep 0.1
  done
  echo "redis.sh: Redis did not answer on 127.0.0.1:$1 (see $2/redis.log)" >&2
  exit 1
}

if [ "${1:-}" = "restart" ]; then
  port=${2##*:}; port=${port%%/*}
  dir=$(redis-cli -h 127.0.0.1 -p "$port" config get dir | tail -n 1)
  redis-cli -h 127.0.0.1 -p "$port" shutdown >/dev/null 2>&1 || true
  sleep 0.5
  start "$port" "$dir"
  echo "redis://127.0.0.1:$port/0"
  exit 0
fi

if [ "${1:-}" = "start" ]; then
  port=${2##*:}; port=${port%%/*}
  start "$port" "$3"
  echo "redis://127.0.0.1:$port/0"
  exit 0
fi

port=$(python3 -c "import socket; s = socket.socket(); s.bind(('127.0.0.1', 0)); print(s.getsockname()[1])")
data=$(mktemp -d /tmp/coldcert-redis.XXXXXX)
start "$port" "$data"
echo "redis://127.0.0.1:$port/0"
