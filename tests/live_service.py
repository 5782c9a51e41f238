"""A real hotbasis over HTTP for end-to-end tests: redis-server, gunicorn and a queue worker as subprocesses."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request
from dataclasses import dataclass
from pathlib import Path

import pytest
from conftest import free_port, start_redis, stop_redis

ROOT = Path(__file__).resolve().parents[1]
LIVE_KEY = "live-e2e-key-0123456789abcdef"
# the service's command line as deploy/ runs it, from the repository root
GUNICORN = [sys.executable, "-m", "gunicorn", "-c", str(ROOT / "deploy" / "gunicorn.conf.py"), "service.wsgi:app"]


def start_gunicorn(env: dict[str, str], out) -> subprocess.Popen:
    """gunicorn with deploy/gunicorn.conf.py; its output (both streams) to ``out``."""
    return subprocess.Popen(GUNICORN, cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)


def wait_ready(base: str, api: subprocess.Popen, timeout: float = 60) -> bool:
    """True once ``base``/readyz answers; False if gunicorn exits or ``timeout`` passes first."""
    deadline = time.monotonic() + timeout
    while True:
        try:
            urllib.request.urlopen(base + "/readyz", timeout=1)
            return True
        except OSError:
            if api.poll() is not None or time.monotonic() > deadline:
                return False
            time.sleep(0.2)


@dataclass
class LiveService:
    base: str
    key: str
    redis_url: str
    redis_dir: Path
    redis_port: int
    redis: subprocess.Popen
    api: subprocess.Popen
    worker: subprocess.Popen | None
    log: Path

    def env(self) -> dict[str, str]:
        """Environment for a client process: the CLI and the example read these."""
        return {**os.environ, "HOTBASIS_URL": self.base, "HOTBASIS_API_KEY": self.key}


def start_service(workdir: Path, worker: bool = True, appendonly: bool = False) -> LiveService:
    redis_dir = workdir / "redis"
    redis_proc, redis_port = start_redis(redis_dir, appendonly=appendonly)
    redis_url = f"redis://127.0.0.1:{redis_port}/0"
    port = free_port()
    env = {
        **os.environ,
        "PORT": str(port),
        "HOTBASIS_REDIS_URL": redis_url,
        "HOTBASIS_API_KEYS": f"acme:{LIVE_KEY}",
        "HOTBASIS_WORKERS": "2",
        "HOTBASIS_JOB_BLOCK": "0.2",
    }
    log = workdir / "service.log"
    with open(log, "wb") as out:
        api = start_gunicorn(env, out)
        work = (
            subprocess.Popen(
                [sys.executable, "-m", "service.worker"],
                cwd=ROOT,
                env=env,
                stdout=out,
                stderr=subprocess.STDOUT,
            )
            if worker
            else None
        )
    svc = LiveService(f"http://127.0.0.1:{port}", LIVE_KEY, redis_url, redis_dir, redis_port, redis_proc, api,
                      work, log)  # fmt: skip
    if not wait_ready(svc.base, api):
        stop_service(svc)
        pytest.fail("gunicorn did not become ready:\n" + log.read_text()[-3000:])
    return svc


def _stop(proc: subprocess.Popen | None) -> None:
    if proc is None or proc.poll() is not None:
        return
    proc.send_signal(signal.SIGTERM)
    try:
        proc.wait(timeout=30)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


def stop_service(svc: LiveService) -> None:
    _stop(svc.worker)
    _stop(svc.api)
    if svc.redis.poll() is None:
        stop_redis(svc.redis)
