"""Redis going away under load: every answer is a success that committed or a 503 problem, in bounded time.

The test owns its redis-server (not the shared fixture): it freezes it
(SIGSTOP: connections open but nothing answers, the case a timeout must
catch), kills it (kill -9: connections refused), then starts it again on the
same port and data directory and checks the same app serves 200s again.
"""

from __future__ import annotations

import signal
import threading
import time

import pytest
from conftest import TENANT_KEYS, auth, juice_network

from service.app import create_app

from .servers import RedisProcess, start_single

MERGE = "application/merge-patch+json"
TIMEOUT = 1.0  # the app's Redis socket and connect timeouts in this test
# A request can meet up to three timeouts: the command that finds Redis frozen, then redis-py's UNWATCH
# when a compare-and-set transaction is abandoned, then releasing an Idempotency-Key; plus a margin.
BOUND = 3 * TIMEOUT + 1.5

pytestmark = pytest.mark.slow


def make_app(url: str):
    return create_app(
        {
            "TESTING": True,
            "REDIS_URL": url,
            "REDIS_TIMEOUT": TIMEOUT,
            "REDIS_CONNECT_TIMEOUT": TIMEOUT,
            "API_KEYS": {key: tenant for tenant, key in TENANT_KEYS.items()},
        }
    )


def test_redis_outage_answers_503_in_bounded_time_and_the_app_recovers(tmp_path):
    server = start_single(tmp_path / "redis", ["--appendonly", "yes", "--appendfsync", "always"])
    try:
        app = make_app(server.url)
        client = app.test_client()
        created = client.post("/v1/models", json=juice_network(), headers=auth())
        assert created.status_code == 201
        mid = created.get_json()["id"]
        answers: list[tuple[str, int, str, float, int | None]] = []
        stop = threading.Event()

        def load(k: int) -> None:
            c = app.test_client()
            i = 0
            while not stop.is_set():
                i += 1
                t = time.monotonic()
                if k % 2:
                    body = {"constraints": {f"audit_{k}_{i}": {"terms": {"ship_press_north_cafe_a": 1},
                                                               "upper": 1000 + i}}}  # fmt: skip
                    resp = c.patch(f"/v1/models/{mid}", json=body, headers={**auth(), "Content-Type": MERGE})
                    kind = "patch"
                else:
                    resp = c.get(f"/v1/models/{mid}?solution=none", headers=auth())
                    kind = "get"
                version = resp.get_json().get("version") if resp.status_code == 200 else None
                answers.append((kind, resp.status_code, resp.mimetype, time.monotonic() - t, version))
                if resp.status_code == 503:
                    problem = resp.get_json()
                    assert problem["type"] == "urn:hotbasis:problem:storage-unavailable", problem

        threads = [threading.Thread(target=load, args=(k,)) for k in range(6)]
        for t in threads:
            t.start()
        time.sleep(0.5)
        server.signal(signal.SIGSTOP)  # frozen: accepts connections, answers nothing
        time.sleep(2.5)
        ready = client.get("/readyz")
        assert ready.status_code == 503 and ready.mimetype == "application/problem+json"
        server.kill()  # kill -9 while frozen requests wait
        time.sleep(1.5)
        stop.set()
        for t in threads:
            t.join(timeout=30)
        assert not any(t.is_alive() for t in threads)

        statuses = {status for _, status, _, _, _ in answers}
        assert statuses <= {200, 503}, statuses  # never a 500
        assert 503 in statuses and 200 in statuses
        for kind, status, mimetype, elapsed, _ in answers:
            assert elapsed < BOUND, (kind, status, elapsed)  # never a hang
            if status == 503:
                assert mimetype == "application/problem+json"

        # the same app, Redis back on the same port and data directory: 200s again
        restarted = RedisProcess(server.workdir, server.port, server.options)
        restarted.start()
        server = restarted
        deadline = time.monotonic() + 10
        while client.get("/readyz").status_code != 200:
            assert time.monotonic() < deadline, "the app did not see Redis come back"
            time.sleep(0.1)
        for i in range(5):
            body = {
                "constraints": {f"after_{i}": {"terms": {"ship_press_south_market": 1}, "upper": 500 + i}}
            }
            resp = client.patch(f"/v1/models/{mid}", json=body, headers={**auth(), "Content-Type": MERGE})
            assert resp.status_code == 200, resp.get_json()
        doc = client.get(f"/v1/models/{mid}", headers=auth()).get_json()
        # every PATCH answered 200 during the outage committed (AOF with fsync always, see test_durability)
        acknowledged = {v for kind, status, _, _, v in answers if kind == "patch" and status == 200}
        versions = client.get(f"/v1/models/{mid}/versions", headers=auth()).get_json()
        kept = {v["version"] for v in versions["versions"]}
        assert {v for v in acknowledged if v >= versions["versions"][-1]["version"]} <= kept
        assert max(acknowledged, default=1) < doc["version"]
    finally:
        server.stop()
