"""PATCH: merge patches re-optimized warm, concurrency, If-Match, Idempotency-Key."""

from __future__ import annotations

import threading

import orjson
import pytest
from conftest import PIVOT_FIELDS, auth, juice_network, reference_objective, snapshot

from service.operations import cache_id

MERGE = "application/merge-patch+json"


def new_model(client) -> str:
    resp = client.post("/v1/models", json=juice_network(), headers=auth())
    assert resp.status_code == 201
    return resp.get_json()["id"]


def patch(client, mid, body, path="", headers=None, query=""):
    return client.patch(
        f"/v1/models/{mid}{path}{query}",
        data=orjson.dumps(body),
        content_type=MERGE,
        headers={**auth(), **(headers or {})},
    )


def current_doc(client, mid) -> dict:
    return client.get(f"/v1/models/{mid}", headers=auth()).get_json()["model"]


def test_violated_constraint_is_reoptimized_warm_by_dual_simplex(client):
    mid = new_model(client)
    resp = patch(
        client,
        mid,
        {"constraints": {"lane_cap_south_market": {"terms": {"ship_press_south_market": 1}, "upper": 20}}},
    )
    assert resp.status_code == 200 and resp.headers["ETag"] == '"v2"'
    body = resp.get_json()
    assert body["version"] == 2 and body["status"] == "optimal"
    assert body["solve"]["warm"] is True and body["solve"]["method"] == "dual"
    assert body["solve"]["pivots"] >= 1 and body["solve"]["fallback"] is None
    pivots = [e for e in body["pivot_log"] if "event" not in e]
    assert len(pivots) == body["solve"]["pivots"]
    assert PIVOT_FIELDS <= set(pivots[0])
    assert pivots[0]["algorithm"] == "dual" and pivots[0]["leaving"] == "lane_cap_south_market"
    # reference solve: scipy.optimize.linprog (HiGHS) on the changed document
    assert body["objective"] == pytest.approx(reference_objective(current_doc(client, mid)), rel=1e-9)
    assert body["objective"] == pytest.approx(400.0)
    changes = body["changes"]
    assert changes["model"]["rows_added"] == ["lane_cap_south_market"] and changes["model"]["kind"] == "dual"
    assert changes["objective"] == {
        "before": 385.0,
        "after": pytest.approx(400.0),
        "delta": pytest.approx(15.0),
    }
    assert changes["variables"]["ship_press_south_market"] == {"before": 35.0, "after": pytest.approx(20.0)}
    assert changes["variables"]["ship_press_north_market"] == {"before": 10.0, "after": pytest.approx(25.0)}
    assert body["solution"]["constraints"]["lane_cap_south_market"]["shadow_price"] == pytest.approx(-1.0)


def test_profitable_variable_is_reoptimized_warm_by_primal_simplex(client):
    mid = new_model(client)
    resp = patch(
        client,
        mid,
        {
            "variables": {"ship_press_east_market": {"cost": 2, "upper": 40}},
            "constraints": {"demand_market": {"terms": {"ship_press_east_market": 1}}},
        },
    )
    body = resp.get_json()
    assert resp.status_code == 200
    assert body["solve"]["warm"] is True and body["solve"]["method"] == "primal"
    assert body["solve"]["pivots"] >= 1
    assert {e["algorithm"] for e in body["pivot_log"] if "event" not in e} == {"primal"}
    assert body["objective"] == pytest.approx(reference_objective(current_doc(client, mid)), rel=1e-9)
    assert body["solution"]["variables"]["ship_press_east_market"]["value"] == pytest.approx(40)
    assert body["changes"]["model"]["columns_added"] == ["ship_press_east_market"]
    assert body["changes"]["variables"]["ship_press_east_market"] == {
        "before": None,
        "after": pytest.approx(40),
    }


def test_section_endpoints_and_removals(client):
    mid = new_model(client)
    resp = patch(
        client, mid, {"lane_cap": {"terms": {"ship_press_south_market": 1}, "upper": 30}}, path="/constraints"
    )
    assert resp.status_code == 200 and resp.get_json()["version"] == 2
    resp = patch(client, mid, {"ship_press_north_cafe_b": {"upper": 0}}, path="/variables")
    assert resp.status_code == 200 and resp.get_json()["changes"]["model"]["column_bounds"] == [
        "ship_press_north_cafe_b"
    ]
    resp = patch(client, mid, {"lane_cap": None}, path="/constraints")
    body = resp.get_json()
    assert body["changes"]["model"]["rows_removed"] == ["lane_cap"] and body["version"] == 4
    doc = current_doc(client, mid)
    assert "lane_cap" not in doc["constraints"] and doc["variables"]["ship_press_north_cafe_b"]["upper"] == 0
    assert body["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)
    bad = patch(client, mid, {"ghost_row": {"terms": {"nobody": 1}}}, path="/constraints")
    assert bad.status_code == 400
    assert bad.get_json()["errors"][0]["pointer"] == "/ghost_row/terms/nobody"  # relative to the map sent


def test_cost_and_sense_changes_and_lower_bound_null(client):
    mid = new_model(client)
    resp = patch(client, mid, {"variables": {"ship_press_south_market": {"cost": 9}}})
    body = resp.get_json()
    assert body["changes"]["model"]["costs"] == ["ship_press_south_market"]
    assert body["solve"]["warm"] is True and body["solve"]["method"] in (
        "primal",
        "dual+primal",
        "primal+dual",
    )
    assert body["objective"] == pytest.approx(reference_objective(current_doc(client, mid)), rel=1e-9)
    resp = patch(client, mid, {"variables": {"ship_press_south_cafe_b": {"lower": None, "upper": 25}}})
    assert current_doc(client, mid)["variables"]["ship_press_south_cafe_b"]["lower"] is None


def test_patch_that_changes_nothing_stores_nothing(client):
    mid = new_model(client)
    resp = patch(client, mid, {"variables": {"ship_press_north_cafe_a": {"cost": 4}}})
    assert resp.status_code == 200 and resp.get_json()["version"] == 1 and resp.headers["ETag"] == '"v1"'
    renamed = patch(client, mid, {"name": "juice network, spring"})
    assert renamed.get_json()["version"] == 2 and renamed.get_json()["solve"]["pivots"] == 0


def test_if_match(client, rclient):
    mid = new_model(client)
    ok = patch(client, mid, {"constraints": {"demand_cafe_a": {"lower": 31}}}, headers={"If-Match": '"v1"'})
    assert ok.status_code == 200 and ok.headers["ETag"] == '"v2"'
    before = snapshot(rclient)
    stale = patch(
        client, mid, {"constraints": {"demand_cafe_a": {"lower": 32}}}, headers={"If-Match": '"v1"'}
    )
    assert stale.status_code == 412 and stale.mimetype == "application/problem+json"
    assert stale.get_json()["current_version"] == 2 and stale.headers["ETag"] == '"v2"'
    assert snapshot(rclient) == before
    star = patch(client, mid, {"constraints": {"demand_cafe_a": {"lower": 33}}}, headers={"If-Match": "*"})
    assert star.status_code == 200 and star.get_json()["version"] == 3


def test_concurrent_patches_are_serialized_and_none_is_lost(app):
    client = app.test_client()
    mid = new_model(client)
    n = 8
    statuses: list[int] = []
    barrier = threading.Barrier(n)

    def worker(k: int) -> None:
        c = app.test_client()
        barrier.wait()
        resp = patch(
            c,
            mid,
            {"constraints": {f"audit_{k}": {"terms": {"ship_press_north_cafe_a": 1}, "upper": 100 + k}}},
        )
        statuses.append(resp.status_code)

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert statuses == [200] * n
    head = client.get(f"/v1/models/{mid}", headers=auth()).get_json()
    assert head["version"] == 1 + n
    assert {f"audit_{k}" for k in range(n)} <= set(head["model"]["constraints"])
    versions = client.get(f"/v1/models/{mid}/versions", headers=auth()).get_json()["versions"]
    assert [v["version"] for v in versions] == list(range(1 + n, 0, -1))
    assert all(v["changes"]["rows_added"] == 1 for v in versions[:-1])


def test_idempotency_key_replays_without_applying_again(client, rclient):
    mid = new_model(client)
    key = {"Idempotency-Key": "nightly-2026-12-01-row-17"}
    body = {"constraints": {"demand_cafe_b": {"lower": 28}}}
    first = patch(client, mid, body, headers=key)
    assert first.status_code == 200 and first.get_json()["version"] == 2
    before = snapshot(rclient)
    again = patch(client, mid, body, headers=key)
    assert again.status_code == 200 and again.data == first.data
    assert again.headers["Hotbasis-Replayed"] == "true" and again.headers["ETag"] == '"v2"'
    assert snapshot(rclient) == before
    other = patch(client, mid, {"constraints": {"demand_cafe_b": {"lower": 29}}}, headers=key)
    assert other.status_code == 422 and snapshot(rclient) == before
    assert client.get(f"/v1/models/{mid}", headers=auth()).get_json()["version"] == 2


def test_idempotent_create_and_recovery_after_a_lost_record(client, rclient):
    key = {"Idempotency-Key": "create-juice-1"}
    first = client.post("/v1/models", json=juice_network(), headers={**auth(), **key})
    again = client.post("/v1/models", json=juice_network(), headers={**auth(), **key})
    assert first.status_code == again.status_code == 201 and again.data == first.data
    assert client.get("/v1/models", headers=auth()).get_json()["total"] == 1
    # a crash after the commit but before the response was recorded: the record is lost
    mid = first.get_json()["id"]
    patch_key = {"Idempotency-Key": "patch-after-crash"}
    done = patch(client, mid, {"constraints": {"demand_market": {"lower": 40}}}, headers=patch_key)
    for k in rclient.keys("{hbi:*"):
        rclient.delete(k)
    replay = patch(client, mid, {"constraints": {"demand_market": {"lower": 40}}}, headers=patch_key)
    assert replay.status_code == 200 and replay.get_json() == done.get_json()
    assert replay.headers["Hotbasis-Replayed"] == "true"
    assert client.get(f"/v1/models/{mid}", headers=auth()).get_json()["version"] == 2
    for k in rclient.keys("{hbi:*"):
        rclient.delete(k)
    recreated = client.post("/v1/models", json=juice_network(), headers={**auth(), **key})
    assert recreated.status_code == 201 and recreated.get_json()["id"] == mid
    assert client.get("/v1/models", headers=auth()).get_json()["total"] == 1


def test_a_model_created_again_under_its_id_is_not_answered_from_another_workers_cache(redis_url, rclient):
    """Two workers (two apps on one Redis). Worker B caches version 2 of a model; worker A deletes
    it and creates another model under the same id (same Idempotency-Key once its record is gone)
    and changes it to version 2. B's next change must start from the new model, not from its
    cached version 2 of the old one."""
    from conftest import TENANT_KEYS

    from service.app import create_app

    config = {"TESTING": True, "REDIS_URL": redis_url, "API_KEYS": {k: t for t, k in TENANT_KEYS.items()}}
    a, b = create_app(config).test_client(), create_app(config).test_client()
    key = {"Idempotency-Key": "juice-plan-7"}
    mid = a.post("/v1/models", json=juice_network(), headers={**auth(), **key}).get_json()["id"]
    assert patch(b, mid, {"constraints": {"demand_cafe_a": {"lower": 31}}}).status_code == 200
    assert a.delete(f"/v1/models/{mid}", headers=auth()).status_code == 204
    for k in rclient.keys("{hbi:*"):
        rclient.delete(k)
    second = juice_network()
    second["variables"]["ship_press_north_market"]["cost"] = 9  # another model under the same id
    assert a.post("/v1/models", json=second, headers={**auth(), **key}).get_json()["id"] == mid
    assert patch(a, mid, {"constraints": {"demand_cafe_b": {"lower": 26}}}).get_json()["version"] == 2
    resp = patch(b, mid, {"constraints": {"demand_market": {"lower": 46}}})
    assert resp.status_code == 200 and resp.get_json()["version"] == 3
    doc = current_doc(b, mid)
    assert doc["variables"]["ship_press_north_market"]["cost"] == 9
    assert doc["constraints"]["demand_cafe_b"]["lower"] == 26 and doc["constraints"]["demand_cafe_a"]["lower"] == 30


def test_hot_versions_keep_the_engine_state_for_the_next_change(app, client):
    mid = new_model(client)
    patch(client, mid, {"constraints": {"lane_cap": {"terms": {"ship_press_south_market": 1}, "upper": 30}}})
    service = app.extensions["hotbasis"].service
    entry = service.cache.get(cache_id(service.store.head(mid)), 2)
    assert entry is not None and entry.record.version == 2
    assert entry.engine_state is not None  # the warm solve's state, handed to the next reoptimize
    resp = patch(client, mid, {"constraints": {"lane_cap": {"upper": 25}}})
    body = resp.get_json()
    assert body["solve"]["warm"] is True and body["version"] == 3
    assert body["objective"] == pytest.approx(reference_objective(current_doc(client, mid)), rel=1e-9)



def test_pivot_log_holds_only_pivots_and_engine_events_go_to_solve(client):
    """Every pivot_log entry has the contract's ten fields; refactorizations and reuse are solve.events."""
    mid = new_model(client)
    changes = [
        {"constraints": {"cap_extra": {"terms": {"ship_press_south_market": 1}, "upper": 50}}},  # slack
        {"constraints": {"capacity_press_north": {"upper": 69}}},  # a bound moves: cached factorization
        {"constraints": {"cap_extra": {"upper": 20}}},  # now violated: dual pivots
        {"variables": {"ship_press_north_cafe_b": {"cost": 1}}},  # primal pivots
    ]
    events = []
    for body in changes:
        resp = patch(client, mid, body)
        assert resp.status_code == 200
        result = resp.get_json()
        for entry in result["pivot_log"]:
            assert PIVOT_FIELDS <= set(entry), entry
            assert "event" not in entry
        solve = result["solve"]
        assert len(result["pivot_log"]) + solve["log_dropped"] == solve["pivots"]
        assert isinstance(solve["events"], list)
        events += solve["events"]
    # the cached factorization of the previous version was reused at least once: an event, not a pivot
    assert any(e["event"] == "reuse" for e in events), events
    assert all({"event", "iteration", "reason"} <= set(e) for e in events)
