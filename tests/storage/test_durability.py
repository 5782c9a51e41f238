"""Acknowledged writes survive kill -9 of Redis when the AOF is fsynced on every write.

``appendfsync always`` (deploy/local.sh's setting): Redis writes and fsyncs
the AOF before it answers a command, so whatever the service acknowledged is
on disk when redis-server is killed without a chance to flush anything.
"""

from __future__ import annotations

import pytest
from conftest import TENANT_KEYS, auth, juice_network

from service.app import create_app

from .servers import RedisProcess, start_single

MERGE = "application/merge-patch+json"
N = 30

pytestmark = pytest.mark.slow


def make_app(url: str):
    keys = {key: tenant for tenant, key in TENANT_KEYS.items()}
    return create_app({"TESTING": True, "REDIS_URL": url, "API_KEYS": keys, "KEEP_VERSIONS": N + 5})


def test_every_acknowledged_patch_survives_kill_9_of_redis(tmp_path):
    server = start_single(tmp_path / "redis", ["--appendonly", "yes", "--appendfsync", "always"])
    try:
        client = make_app(server.url).test_client()
        created = client.post("/v1/models", json=juice_network(), headers=auth())
        assert created.status_code == 201
        mid = created.get_json()["id"]
        acknowledged: dict[int, float] = {1: created.get_json()["objective"]}
        for i in range(N):
            # tighten press_north step by step: every version has its own optimum
            body = {"constraints": {f"north_cap_{i}": {"terms": {"ship_press_north_cafe_a": 1,
                    "ship_press_north_cafe_b": 1, "ship_press_north_market": 1}, "upper": 70 - i}}}  # fmt: skip
            headers = {**auth(), "Content-Type": MERGE, "Idempotency-Key": f"night-run-{i}"}
            resp = client.patch(f"/v1/models/{mid}", json=body, headers=headers)
            assert resp.status_code == 200
            acknowledged[resp.get_json()["version"]] = resp.get_json()["objective"]
        assert sorted(acknowledged) == list(range(1, N + 2))

        server.kill()  # kill -9 right after the last acknowledgement: no shutdown, no final flush
        server = RedisProcess(server.workdir, server.port, server.options)
        server.start()

        fresh = make_app(server.url).test_client()  # a new process' view: nothing from the old cache
        doc = fresh.get(f"/v1/models/{mid}", headers=auth()).get_json()
        assert doc["version"] == N + 1
        assert {f"north_cap_{i}" for i in range(N)} <= set(doc["model"]["constraints"])
        for version, objective in acknowledged.items():
            stored = fresh.get(f"/v1/models/{mid}/versions/{version}?model=false", headers=auth())
            assert stored.status_code == 200
            assert stored.get_json()["result"]["objective"] == pytest.approx(objective, rel=1e-12)
        # the idempotency records were acknowledged too: a retry replays instead of applying again
        body = {"constraints": {f"north_cap_{N - 1}": {"terms": {"ship_press_north_cafe_a": 1,
                "ship_press_north_cafe_b": 1, "ship_press_north_market": 1}, "upper": 70 - (N - 1)}}}  # fmt: skip
        headers = {**auth(), "Content-Type": MERGE, "Idempotency-Key": f"night-run-{N - 1}"}
        again = fresh.patch(f"/v1/models/{mid}", json=body, headers=headers)
        assert again.status_code == 200 and again.headers["Hotbasis-Replayed"] == "true"
        assert again.get_json()["version"] == N + 1
    finally:
        server.stop()
