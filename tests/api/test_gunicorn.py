"""End to end: gunicorn with deploy/gunicorn.conf.py over real HTTP, the demo, JSON logs, AOF restart."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import time
import urllib.request
from pathlib import Path

import pytest
from conftest import free_port, reference_objective, start_redis, stop_redis
from live_service import start_gunicorn, wait_ready

from service import demo

ROOT = Path(__file__).resolve().parents[2]
KEY = "gunicorn-e2e-key-0123456789abcdef"
pytestmark = pytest.mark.slow


def get(url: str, headers: dict | None = None) -> tuple[int, dict, dict]:
    req = urllib.request.Request(url, headers={"Authorization": f"Bearer {KEY}", **(headers or {})})
    with urllib.request.urlopen(req, timeout=30) as resp:
        return resp.status, json.loads(resp.read()), dict(resp.headers)


@pytest.fixture
def served(tmp_path, request):
    redis_dir = tmp_path / "redis"
    redis_proc, redis_port = start_redis(redis_dir, appendonly=True)
    port = free_port()
    log_path = tmp_path / "api.log"
    env = {
        **os.environ,
        "PORT": str(port),
        "HOTBASIS_REDIS_URL": f"redis://127.0.0.1:{redis_port}/0",
        "HOTBASIS_API_KEYS": f"acme:{KEY}",
        "HOTBASIS_WORKERS": "2",
        **getattr(request, "param", {}),  # extra settings from an indirect parametrization
    }
    with open(log_path, "wb") as log:
        api = start_gunicorn(env, log)
    base = f"http://127.0.0.1:{port}"
    if not wait_ready(base, api):
        api.kill()
        stop_redis(redis_proc)
        pytest.fail("gunicorn did not become ready:\n" + log_path.read_text()[-3000:])
    state = {
        "base": base,
        "log": log_path,
        "redis": redis_proc,
        "redis_dir": redis_dir,
        "redis_port": redis_port,
    }
    yield state
    api.send_signal(signal.SIGTERM)
    try:
        api.wait(timeout=30)
    except subprocess.TimeoutExpired:
        api.kill()
        api.wait()
    stop_redis(state["redis"])


def test_demo_over_gunicorn_then_redis_restart_keeps_every_version(served, capsys):
    out = demo.run(served["base"], KEY)
    printed = capsys.readouterr().out
    assert out["cut"]["solve"]["method"] == "dual" and out["cut"]["solve"]["warm"] is True
    assert out["added"]["solve"]["method"] == "primal" and out["added"]["solve"]["warm"] is True
    assert "bridge_closure[hilltop->south_dc]" in printed and "shadow price" in printed
    assert "deliver[north_dc->grocer_ames] + deliver[south_dc->grocer_ames] >= 420" in printed  # the model
    model_id = out["created"]["id"]
    status, body, headers = get(f"{served['base']}/v1/models/{model_id}", {"X-Request-ID": "e2e-check-1"})
    assert status == 200 and body["version"] == 3 and headers["X-Request-ID"] == "e2e-check-1"
    # reference solve: scipy.optimize.linprog (HiGHS) on the document the service holds
    assert body["result"]["objective"] == pytest.approx(reference_objective(body["model"]), rel=1e-9)

    # every line the service logged is JSON; the request above is there under its id
    lines = [json.loads(line) for line in served["log"].read_text().splitlines() if line.startswith("{")]
    assert any(rec.get("request_id") == "e2e-check-1" and rec.get("status") == 200 for rec in lines)

    # restart Redis from its append-only file: the acknowledged versions are all still there
    stop_redis(served["redis"])
    served["redis"], _ = _restart_redis(served["redis_dir"], served["redis_port"])
    deadline = time.monotonic() + 20
    while True:
        try:
            status, body, _ = get(f"{served['base']}/v1/models/{model_id}/versions")
            break
        except OSError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.2)
    assert [v["version"] for v in body["versions"]] == [3, 2, 1]


def _restart_redis(workdir: Path, port: int):
    return start_redis(workdir, appendonly=True, port=port)


BODY_LIMIT = 4096


def post_chunked(base: str, body: bytes, chunk: int = 1000) -> tuple[int, dict]:
    """POST a model with Transfer-Encoding: chunked (no Content-Length), as streaming clients send."""
    import http.client

    host, port = base.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=30)
    try:
        parts = (body[k : k + chunk] for k in range(0, len(body), chunk))
        conn.request(
            "POST",
            "/v1/models",
            body=parts,
            headers={"Authorization": f"Bearer {KEY}", "Content-Type": "application/json"},
            encode_chunked=True,
        )
        resp = conn.getresponse()
        return resp.status, json.loads(resp.read() or b"{}")
    finally:
        conn.close()


@pytest.mark.parametrize("served", [{"HOTBASIS_MAX_BODY_BYTES": str(BODY_LIMIT)}], indirect=True)
def test_chunked_body_over_the_limit_is_413_not_cut_short(served):
    doc = b'{"variables": {"lane": {"cost": 1}}}'
    at_limit = doc + b" " * (BODY_LIMIT - len(doc))  # whitespace is valid JSON padding
    status, body = post_chunked(served["base"], at_limit)
    assert status == 201, body
    status, body = post_chunked(served["base"], at_limit + b" ")
    assert status == 413, body
    assert body["type"].endswith("body-too-large")
    status, listing, _ = get(f"{served['base']}/v1/models")
    assert listing["total"] == 1  # the refused body stored nothing
