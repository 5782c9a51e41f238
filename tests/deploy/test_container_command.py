"""The image's exact command line (deploy/Dockerfile CMD) run on the host against a throwaway Redis.

No container engine runs here, so the test does what the container would: the Dockerfile's ENV, the
repository root as the working directory (the image's /app has the same layout), and CMD as written.
Only what must differ on a test host is overridden: the bind address (loopback, a free port), the
Redis URL, the keys and the path of openapi.yaml.
"""

from __future__ import annotations

import http.client
import json
import os
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import pytest
from conftest import free_port, juice_network, start_redis, stop_redis
from prometheus_client.parser import text_string_to_metric_families

from tests.deploy.files import ROOT, Dockerfile

KEY = "deploy-test-key-0123456789abcdef"
pytestmark = pytest.mark.slow


def container_env(redis_url: str, port: int, **extra: str) -> dict[str, str]:
    env = {**os.environ, **Dockerfile.read().env()}
    env.update(
        {
            "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}",
            "HOTBASIS_BIND": f"127.0.0.1:{port}",
            "HOTBASIS_OPENAPI": str(ROOT / "openapi.yaml"),
            "HOTBASIS_REDIS_URL": redis_url,
            "HOTBASIS_API_KEYS": f"acme:{KEY}",
            **extra,
        }
    )
    env.pop("PORT", None)
    return env


class Server:
    def __init__(self, proc: subprocess.Popen, base: str, env: dict[str, str], log: Path) -> None:
        self.proc, self.base, self.env, self.log = proc, base, env, log

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


@pytest.fixture
def redis_url(tmp_path):
    proc, port = start_redis(tmp_path / "redis")
    yield f"redis://127.0.0.1:{port}/0"
    stop_redis(proc)


def start_server(tmp_path: Path, redis_url: str, **extra: str) -> Server:
    port = free_port()
    env = container_env(redis_url, port, **extra)
    log = tmp_path / "api.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(Dockerfile.read().command(), cwd=ROOT, env=env, stdout=out, stderr=out)
    server = Server(proc, f"http://127.0.0.1:{port}", env, log)
    deadline = time.monotonic() + 60
    while True:
        try:
            with urllib.request.urlopen(server.base + "/readyz", timeout=2) as resp:
                assert resp.status == 200
                return server
        except OSError:
            if proc.poll() is not None or time.monotonic() > deadline:
                server.stop()
                pytest.fail("the image's command did not become ready:\n" + log.read_text()[-3000:])
            time.sleep(0.2)


@pytest.fixture
def server(tmp_path, redis_url):
    srv = start_server(
        tmp_path, redis_url, HOTBASIS_WORKERS="2", PROMETHEUS_MULTIPROC_DIR=str(tmp_path / "metrics")
    )
    yield srv
    srv.stop()


def test_image_command_serves_and_its_healthcheck_passes(server):
    with urllib.request.urlopen(server.base + "/readyz", timeout=5) as resp:
        assert json.loads(resp.read()) == {"status": "ready"}
    # the image's HEALTHCHECK command, run the same way
    check = subprocess.run(Dockerfile.read().healthcheck_argv(), cwd=ROOT, env=server.env, timeout=30)
    assert check.returncode == 0
    gone = subprocess.run(
        Dockerfile.read().healthcheck_argv(),
        cwd=ROOT,
        env={**server.env, "HOTBASIS_BIND": f"127.0.0.1:{free_port()}"},
        capture_output=True,
        timeout=30,
    )
    assert gone.returncode == 1  # nothing listens there: the check fails


def _healthz_count(text: str) -> float:
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == "hotbasis_http_requests_total" and s.labels.get("route") == "/healthz":
                return s.value
    return 0.0


def test_metrics_add_up_over_gunicorn_workers(server, tmp_path):
    def pids() -> set[str]:
        return {p.stem.rsplit("_", 1)[-1] for p in (tmp_path / "metrics").glob("counter_*.db")}

    sent = 0
    deadline = time.monotonic() + 30
    # a new connection each time; which worker accepts is up to the kernel, so go on until both did
    while sent < 40 or (len(pids()) < 2 and time.monotonic() < deadline):
        with urllib.request.urlopen(server.base + "/healthz", timeout=5) as resp:
            assert resp.status == 200
        sent += 1
    assert len(pids()) == 2, pids()  # both workers counted requests ...
    for _ in range(4):  # ... and every scrape, whichever worker answers it, shows the sum
        with urllib.request.urlopen(server.base + "/metrics", timeout=5) as resp:
            assert resp.status == 200
            assert _healthz_count(resp.read().decode()) == sent


def test_sigterm_lets_the_request_in_flight_finish(tmp_path, redis_url):
    srv = start_server(tmp_path, redis_url, HOTBASIS_WORKERS="1", HOTBASIS_GRACEFUL_TIMEOUT="20")
    body = json.dumps(juice_network()).encode()
    release = threading.Event()
    answer: dict = {}

    def parts():
        yield body[:100]
        release.wait(30)  # the request stays in flight until the test lets the rest go
        yield body[100:]

    def client():
        host, port = srv.base.removeprefix("http://").split(":")
        conn = http.client.HTTPConnection(host, int(port), timeout=60)
        try:
            conn.request(
                "POST",
                "/v1/models",
                body=parts(),
                headers={"Authorization": f"Bearer {KEY}", "Content-Type": "application/json"},
                encode_chunked=True,
            )
            resp = conn.getresponse()
            answer["status"], answer["body"] = resp.status, json.loads(resp.read())
        except Exception as exc:  # noqa: BLE001 - reported by the assertion below
            answer["error"] = repr(exc)
        finally:
            conn.close()

    thread = threading.Thread(target=client)
    thread.start()
    try:
        time.sleep(1.0)  # headers and the first part are in; the worker is reading the body
        srv.proc.send_signal(signal.SIGTERM)
        time.sleep(2.0)
        assert srv.proc.poll() is None, "gunicorn exited with a request in flight"
        with pytest.raises(OSError):  # no new connections once stopping
            urllib.request.urlopen(srv.base + "/healthz", timeout=2)
        release.set()
        thread.join(30)
        assert answer.get("status") == 201, answer
        assert answer["body"]["status"] == "optimal"
        assert srv.proc.wait(timeout=30) == 0  # then it stops by itself, cleanly
    finally:
        release.set()
        srv.stop()
