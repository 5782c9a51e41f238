#!/usr/bin/env bash
# hotbasis on one machine: `up` (bootstrap, Redis, gunicorn, demo), `down`, `test` (bootstrap, ruff, pytest).
# Needs only python3 and apt (as root, missing OS packages are installed; otherwise it says what to run).
set -euo pipefail

ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
LOCAL="$ROOT/.local"
VENV="$ROOT/.venv"
PORT="${PORT:-8750}"
REDIS_PORT="${REDIS_PORT:-6390}"
PY="$VENV/bin/python"

say() { printf '[hotbasis] %s\n' "$*"; }
die() { printf '[hotbasis] error: %s\n' "$*" >&2; exit 1; }
is_root() { [ "$(id -u)" = "0" ]; }

apt_install() {  # apt_install <package>...: install OS packages when root, else explain
  if is_root && command -v apt-get >/dev/null 2>&1; then
    say "installing $* with apt-get"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq
    apt-get install -y -qq "$@" >/dev/null
  else
    die "missing OS package(s): $*. Install them first, e.g.: sudo apt-get update && sudo apt-get install -y $*"
  fi
}

bootstrap() {
  command -v python3 >/dev/null 2>&1 || die "python3 is required"
  if [ ! -x "$PY" ]; then
    say "creating $VENV"
    if ! python3 -m venv "$VENV" 2>/dev/null; then
      rm -rf "$VENV"
      apt_install "python3-venv"
      python3 -m venv "$VENV"
    fi
  fi
  local stamp="$VENV/.hotbasis-installed"
  if [ ! -f "$stamp" ] || [ "$ROOT/pyproject.toml" -nt "$stamp" ]; then
    say "installing the package and its test tools into .venv (pip install -e .[test])"
    # (grep drops pip's notes about index locations that this machine's pip configuration names)
    "$PY" -m pip install --quiet --disable-pip-version-check --upgrade pip 2>&1 | grep -v "is ignored: it is" || true
    # (PYTHONWARNINGS: setuptools' editable-install notice about same-named folders is about this very
    # folder, the package itself; it only alarmed readers of the bootstrap output)
    PYTHONWARNINGS=ignore "$PY" -m pip install --quiet --disable-pip-version-check -e "$ROOT[test]" 2>&1 \
      | grep -v -e "is ignored: it is" -e "BuildBackendWarning" || true
    "$PY" -c "import service, flask, marshmallow, highspy, orjson, redis, schemathesis" \
      || die "the package did not install into .venv"
    touch "$stamp"
  fi
  if ! command -v redis-server >/dev/null 2>&1; then
    apt_install redis-server
  fi
  command -v redis-server >/dev/null 2>&1 || die "redis-server is still not on PATH"
}

redis_ping() {
  "$PY" - "$REDIS_PORT" <<'PYEOF'
import sys, redis
try:
    sys.exit(0 if redis.Redis(host="127.0.0.1", port=int(sys.argv[1]), socket_timeout=1).ping() else 1)
except Exception:
    sys.exit(1)
PYEOF
}

start_redis() {
  mkdir -p "$LOCAL/redis" "$LOCAL/logs"
  if redis_ping; then
    say "Redis already answers on 127.0.0.1:$REDIS_PORT"
    return
  fi
  # AOF fsynced on every write (appendfsync always): Redis answers a write only once it is on disk, so
  # an acknowledged write survives a crash or kill -9 of Redis and a crash of the machine (DEVELOPERS.md).
  redis-server --port "$REDIS_PORT" --bind 127.0.0.1 --dir "$LOCAL/redis" \
    --appendonly yes --appendfsync always --save "" \
    --daemonize yes --pidfile "$LOCAL/redis.pid" --logfile "$LOCAL/logs/redis.log"
  for _ in $(seq 1 100); do
    redis_ping && { say "Redis on 127.0.0.1:$REDIS_PORT (AOF under .local/redis)"; return; }
    sleep 0.1
  done
  die "Redis did not start; see $LOCAL/logs/redis.log"
}

ensure_keys() {
  if [ -n "${HOTBASIS_API_KEYS:-}" ] || [ -n "${HOTBASIS_API_KEYS_FILE:-}" ]; then
    DEMO_KEY="${HOTBASIS_DEMO_KEY:-}"
    if [ -z "$DEMO_KEY" ] && [ -n "${HOTBASIS_API_KEYS:-}" ]; then
      DEMO_KEY="$(printf '%s' "$HOTBASIS_API_KEYS" | cut -d, -f1 | cut -d: -f2- | tr -d '[:space:]')"
    fi
    if [ -z "$DEMO_KEY" ] && [ -n "${HOTBASIS_API_KEYS_FILE:-}" ]; then
      DEMO_KEY="$(grep -v '^[[:space:]]*#' "$HOTBASIS_API_KEYS_FILE" | tr ',' '\n' | grep ':' | head -n1 \
        | cut -d: -f2- | cut -d'#' -f1 | tr -d '[:space:]')"
    fi
    return
  fi
  local file="$LOCAL/api-keys"
  if [ ! -f "$file" ]; then
    umask 077
    printf 'dev:%s\n' "$("$PY" -c 'import secrets; print(secrets.token_urlsafe(24))')" > "$file"
    say "generated a development API key in .local/api-keys"
  fi
  export HOTBASIS_API_KEYS_FILE="$file"
  DEMO_KEY="$(head -n1 "$file" | cut -d: -f2-)"
}

start_api() {
  if [ -f "$LOCAL/gunicorn.pid" ] && kill -0 "$(cat "$LOCAL/gunicorn.pid")" 2>/dev/null; then
    say "gunicorn already running (pid $(cat "$LOCAL/gunicorn.pid"))"
  else
    HOTBASIS_REDIS_URL="redis://127.0.0.1:$REDIS_PORT/0" PORT="$PORT" \
      "$VENV/bin/gunicorn" -c "$ROOT/deploy/gunicorn.conf.py" --chdir "$ROOT" \
      --pid "$LOCAL/gunicorn.pid" --daemon --error-logfile "$LOCAL/logs/api.log" --capture-output \
      service.wsgi:app
  fi
  for i in $(seq 1 300); do
    if [ "$i" -gt 25 ] && { [ ! -f "$LOCAL/gunicorn.pid" ] || ! kill -0 "$(cat "$LOCAL/gunicorn.pid")" 2>/dev/null; }; then
      break  # the master is gone: no point in waiting
    fi
    if "$PY" -c "import urllib.request,sys; urllib.request.urlopen('http://127.0.0.1:$PORT/readyz', timeout=1)" \
        2>/dev/null; then
      say "API ready on http://127.0.0.1:$PORT (logs: .local/logs/api.log)"
      return
    fi
    sleep 0.2
  done
  tail -n 20 "$LOCAL/logs/api.log" >&2 || true
  die "the API did not become ready on port $PORT"
}

start_workers() {  # HOTBASIS_WORKERS_ASYNC queue workers (python -m service.worker), one pid file each
  local count="${HOTBASIS_WORKERS_ASYNC:-2}" i pidfile
  for i in $(seq 1 "$count"); do
    pidfile="$LOCAL/worker-$i.pid"
    if [ -f "$pidfile" ] && kill -0 "$(cat "$pidfile")" 2>/dev/null; then
      continue
    fi
    # (exec: the pid file names the worker itself, and no shell keeps this script's output open)
    (cd "$ROOT" && HOTBASIS_REDIS_URL="redis://127.0.0.1:$REDIS_PORT/0" \
      HOTBASIS_WORKER_METRICS_PORT="$((PORT + i))" HOTBASIS_WORKER_METRICS_BIND=127.0.0.1 \
      exec nohup "$PY" -m service.worker >>"$LOCAL/logs/worker-$i.log" 2>&1 </dev/null) &
    echo $! > "$pidfile"
  done
  say "$count queue worker(s) for async jobs (logs: .local/logs/worker-*.log; metrics: ports $((PORT + 1))-$((PORT + count)))"
}

stop_pidfile() {  # stop_pidfile <file> <label>
  local file="$1" label="$2"
  if [ -f "$file" ]; then
    local pid
    pid="$(cat "$file")"
    if kill -0 "$pid" 2>/dev/null; then
      kill -TERM "$pid"
      for _ in $(seq 1 100); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
      say "stopped $label (pid $pid)"
    fi
    rm -f "$file"
  fi
}

case "${1:-}" in
  up)
    bootstrap
    start_redis
    ensure_keys
    start_api
    start_workers
    HOTBASIS_DEMO_KEY="$DEMO_KEY" "$PY" -m service.demo --url "http://127.0.0.1:$PORT"
    say "the service keeps running: http://127.0.0.1:$PORT   (stop it with: bash deploy/local.sh down)"
    if [ -z "${HOTBASIS_API_KEYS:-}" ] && [ "${HOTBASIS_API_KEYS_FILE:-}" = "$LOCAL/api-keys" ]; then
      say "development API key (tenant dev): $DEMO_KEY"
    fi
    say "try: curl -s -H \"Authorization: Bearer \$KEY\" http://127.0.0.1:$PORT/v1/models"
    ;;
  down)
    for pidfile in "$LOCAL"/worker-*.pid; do  # SIGTERM: each finishes the job in hand first
      if [ -e "$pidfile" ]; then stop_pidfile "$pidfile" "queue worker"; fi
    done
    stop_pidfile "$LOCAL/gunicorn.pid" "gunicorn"
    stop_pidfile "$LOCAL/redis.pid" "Redis"
    ;;
  test)
    bootstrap
    cd "$ROOT"
    say "ruff check"
    "$VENV/bin/ruff" check .
    say "pytest (all of tests/)"
    "$PY" -m pytest -q -p no:cacheprovider tests
    ;;
  *)
    echo "usage: bash deploy/local.sh up|down|test" >&2
    exit 2
    ;;
esac
