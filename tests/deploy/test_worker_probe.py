"""The workers' Kubernetes/compose probe (deploy/healthcheck.py worker) against a real worker and Redis."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest
from conftest import start_redis, stop_redis

from tests.deploy.files import ROOT

pytestmark = pytest.mark.slow
pytest.importorskip("service.worker")  # the queue worker (async jobs)


def probe(env: dict[str, str]) -> int:
    cmd = [sys.executable, "deploy/healthcheck.py", "worker"]
    return subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, timeout=60).returncode


def test_worker_probe_follows_the_worker(tmp_path):
    redis_proc, port = start_redis(tmp_path / "redis")
    env = {**os.environ, "HOTBASIS_REDIS_URL": f"redis://127.0.0.1:{port}/0", "HOTBASIS_API_KEYS": ""}
    worker = None
    try:
        assert probe(env) == 1  # no worker has read the job stream yet
        worker = subprocess.Popen(
            [sys.executable, "-m", "service.worker"], cwd=ROOT, env=env,
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )  # fmt: skip
        deadline = time.monotonic() + 30
        while probe(env) != 0:
            assert worker.poll() is None and time.monotonic() < deadline, "the probe never saw the worker"
            time.sleep(0.5)
        worker.send_signal(signal.SIGTERM)
        assert worker.wait(timeout=30) == 0
        time.sleep(1.5)
        # the stopped worker's consumer stays registered but stops reading: stale after 1 s
        assert probe({**env, "HOTBASIS_WORKER_STALE_AFTER": "1"}) == 1
    finally:
        if worker is not None and worker.poll() is None:
            worker.kill()
            worker.wait()
        stop_redis(redis_proc)
    # Redis gone: the probe says alive (restarting workers would not bring Redis back)
    assert probe(env) == 0
