"""Container health checks, run inside the image (HEALTHCHECK, Kubernetes exec probes).

``python deploy/healthcheck.py``         the API answers /healthz on its own port (HOTBASIS_BIND or PORT).
``python deploy/healthcheck.py worker``  a queue worker on this host still reads the job stream: some
    consumer named ``<hostname>:...`` in the workers' group touched the stream within
    HOTBASIS_WORKER_STALE_AFTER seconds (default 180). A worker reads every second or so while idle and
    heartbeats while it solves, so a larger gap means it hangs. Redis being unreachable counts as
    alive: restarting workers would not bring Redis back.
Exit status 0 healthy, 1 not.
"""

from __future__ import annotations

import os
import socket
import sys
import urllib.request
from pathlib import Path

# run as a script from /app (or the repository root): make the service package importable
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def api() -> int:
    bind = os.environ.get("HOTBASIS_BIND") or f"127.0.0.1:{os.environ.get('PORT', '8750')}"
    port = bind.rsplit(":", 1)[-1]
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=3) as resp:
            return 0 if resp.status == 200 else 1
    except OSError as exc:
        print(f"healthz: {exc}", file=sys.stderr)
        return 1


def worker() -> int:
    import redis

    from service.app import create_app
    from service.jobs import GROUP, STREAM

    stale_ms = float(os.environ.get("HOTBASIS_WORKER_STALE_AFTER", "180")) * 1000
    client = create_app({"API_KEYS": {}}).extensions["hotbasis"].service.store.r
    prefix = socket.gethostname() + ":"
    try:
        consumers = client.xinfo_consumers(STREAM, GROUP)
    except (redis.ConnectionError, redis.TimeoutError, redis.BusyLoadingError):
        return 0
    except redis.ResponseError as exc:  # no stream or group yet: no worker has started reading
        print(f"job stream: {exc}", file=sys.stderr)
        return 1
    mine = [c for c in consumers if _text(c.get("name")).startswith(prefix)]
    fresh = [c for c in mine if float(c.get("idle", 0)) < stale_ms]
    if not fresh:
        print(
            f"no consumer {prefix}* read the job stream in the last {stale_ms / 1000:.0f} s", file=sys.stderr
        )
    return 0 if fresh else 1


def _text(value: object) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


if __name__ == "__main__":
    sys.exit(worker() if sys.argv[1:] == ["worker"] else api())
