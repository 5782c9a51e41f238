"""Prefer: respond-async and large models: 202 with a job, GET /v1/jobs/{id}, a worker runs it.

Jobs are run by service.worker.Worker in this process against the same real
redis-server; tests/test_worker.py runs workers as separate processes.
"""

from __future__ import annotations

import pytest
from api.test_patch import new_model, patch
from conftest import TENANT_KEYS, auth, juice_network, reference_objective, snapshot

from service.api.jobs import job_queue, prefers_async
from service.jobs import STREAM
from service.worker import Worker

ASYNC = {"Prefer": "respond-async"}
CUT = {"constraints": {"lane_cap_south_market": {"terms": {"ship_press_south_market": 1}, "upper": 20}}}


def run_jobs(app, count: int = 1) -> None:
    """Run ``count`` queued jobs with a real worker (same ModelService kind, same Redis)."""
    worker = Worker(app.extensions["hotbasis"].service, job_queue(app), consumer="test", block=0.2)
    for _ in range(count):
        assert worker.run_once(), "no job was waiting"


def job(client, location, tenant="acme"):
    return client.get(location, headers=auth(tenant))


def versions(client, mid) -> int:
    return len(client.get(f"/v1/models/{mid}/versions", headers=auth()).get_json()["versions"])


def test_prefer_parsing_follows_rfc_7240():
    assert prefers_async("respond-async")
    assert prefers_async("wait=10, Respond-Async")
    assert prefers_async("respond-async; foo=bar")
    assert not prefers_async("return=minimal")
    assert not prefers_async("respond-asyncx")
    assert not prefers_async(None)


def test_async_patch_answers_202_and_the_job_carries_the_synchronous_result(app, client, rclient):
    mid = new_model(client)
    twin = new_model(client)
    resp = patch(client, mid, CUT, headers=ASYNC)
    assert resp.status_code == 202
    assert resp.headers["Preference-Applied"] == "respond-async"
    location = resp.headers["Location"]
    assert location.startswith("/v1/jobs/")
    body = resp.get_json()
    assert body["state"] == "queued" and body["model_id"] == mid and body["result"] is None
    assert body["kind"] == "patch"
    assert rclient.xlen(STREAM) == 1
    assert versions(client, mid) == 1  # nothing applied yet

    queued = job(client, location)
    assert queued.status_code == 200 and queued.get_json()["state"] == "queued"
    run_jobs(app)

    done = job(client, location).get_json()
    assert done["state"] == "done" and done["error"] is None
    assert done["version"] == 2 and done["status"] == 200 and done["location"] == f"/v1/models/{mid}"
    assert done["attempts"] == 1 and done["finished_at"] >= done["started_at"] >= done["created_at"]
    result = done["result"]
    sync = patch(client, twin, CUT).get_json()  # the same change answered synchronously
    for key in ("version", "status", "objective", "solution", "changes", "pivot_log"):
        assert result[key] == sync[key], key
    assert result["id"] == mid and result["solve"]["method"] == sync["solve"]["method"] == "dual"
    # reference solve: scipy.optimize.linprog (HiGHS) on the changed document
    doc = client.get(f"/v1/models/{mid}", headers=auth()).get_json()["model"]
    assert result["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)
    assert versions(client, mid) == 2
    assert rclient.xlen(STREAM) == 0  # acknowledged and removed


def test_async_sub_map_patch_and_trimmed_view(app, client):
    mid = new_model(client)
    resp = patch(
        client, mid, CUT["constraints"], path="/constraints", headers=ASYNC, query="?fields=solve,changes"
    )
    assert resp.status_code == 202
    run_jobs(app)
    result = job(client, resp.headers["Location"]).get_json()["result"]
    assert set(result) == {"id", "version", "status", "objective", "solve", "changes"}
    assert result["changes"]["model"]["rows_added"] == ["lane_cap_south_market"]

    resp = patch(client, mid, {"ship_press_south_market": {"cost": 1}}, path="/variables", headers=ASYNC)
    assert resp.status_code == 202
    run_jobs(app)
    done = job(client, resp.headers["Location"]).get_json()
    assert done["state"] == "done" and done["version"] == 3


def test_async_create_fixes_the_model_id_up_front(app, client):
    resp = client.post("/v1/models", json=juice_network(), headers={**auth(), **ASYNC})
    assert resp.status_code == 202 and resp.headers["Preference-Applied"] == "respond-async"
    body = resp.get_json()
    mid = body["model_id"]
    assert body["kind"] == "create"
    assert client.get(f"/v1/models/{mid}", headers=auth()).status_code == 404  # not created yet
    run_jobs(app)
    done = job(client, resp.headers["Location"]).get_json()
    assert done["state"] == "done" and done["status"] == 201 and done["version"] == 1
    assert done["result"]["id"] == mid and done["result"]["objective"] == pytest.approx(385.0)
    got = client.get(f"/v1/models/{mid}", headers=auth())
    assert got.status_code == 200 and got.get_json()["version"] == 1


def test_async_create_from_mps(app, client):
    mps = "\n".join(
        [
            "NAME          KILN",
            "ROWS",
            " N  COST",
            " G  DEMAND",
            "COLUMNS",
            "    FIRE      COST      2.0       DEMAND    1.0",
            "RHS",
            "    RHS       DEMAND    4.0",
            "ENDATA",
        ]
    )
    resp = client.post("/v1/models", data=mps, content_type="text/x-mps", headers={**auth(), **ASYNC})
    assert resp.status_code == 202
    run_jobs(app)
    done = job(client, resp.headers["Location"]).get_json()
    assert done["state"] == "done" and done["result"]["objective"] == pytest.approx(8.0)  # 2 x 4 by hand


def test_jobs_belong_to_their_tenant(app, client):
    mid = new_model(client)
    location = patch(client, mid, CUT, headers=ASYNC).headers["Location"]
    other = job(client, location, tenant="globex")
    assert other.status_code == 404 and other.mimetype == "application/problem+json"
    assert job(client, "/v1/jobs/" + "a" * 20).status_code == 404
    assert job(client, "/v1/jobs/not-a-job").status_code == 404
    assert client.get(location).status_code == 401


@pytest.mark.parametrize(
    "body, headers, status",
    [
        ({"constraints": {"x": {"terms": {"no_such_variable": 1}, "upper": 1}}}, {}, 400),
        ({"variables": {"ship_press_north_cafe_a": {"lower": 5, "upper": 1}}}, {}, 400),
        (CUT, {"If-Match": '"v7"'}, 412),
        (CUT, {"Authorization": "Bearer wrong"}, 401),
        (CUT, {"Idempotency-Key": ""}, 400),
    ],
)
def test_bad_requests_are_refused_synchronously_and_queue_nothing(client, rclient, body, headers, status):
    mid = new_model(client)
    before = snapshot(rclient)
    resp = patch(client, mid, body, headers={**ASYNC, **headers})
    assert resp.status_code == status and resp.mimetype == "application/problem+json"
    assert snapshot(rclient) == before  # nothing stored, nothing queued


def test_bad_document_is_refused_synchronously(client, rclient):
    doc = juice_network()
    doc["variables"]["ship_press_north_cafe_a"]["lower"] = 10
    doc["variables"]["ship_press_north_cafe_a"]["upper"] = 5
    before = snapshot(rclient)
    resp = client.post("/v1/models", json=doc, headers={**auth(), **ASYNC})
    assert resp.status_code == 400
    assert snapshot(rclient) == before


def test_stale_if_match_at_run_time_fails_the_job_with_problem_details(app, client):
    mid = new_model(client)
    resp = patch(client, mid, CUT, headers={**ASYNC, "If-Match": '"v1"'})
    assert resp.status_code == 202
    assert patch(client, mid, {"variables": {"ship_press_south_market": {"cost": 4.5}}}).status_code == 200
    run_jobs(app)
    done = job(client, resp.headers["Location"]).get_json()
    assert done["state"] == "failed" and done["result"] is None and done["status"] == 412
    assert done["error"]["status"] == 412 and done["error"]["type"].endswith("stale-version")
    assert done["error"]["current_version"] == 2
    assert versions(client, mid) == 2


def test_idempotency_key_replays_the_202(app, client, rclient):
    mid = new_model(client)
    headers = {**ASYNC, "Idempotency-Key": "night-run-7"}
    first = patch(client, mid, CUT, headers=headers)
    again = patch(client, mid, CUT, headers=headers)
    assert first.status_code == again.status_code == 202
    assert again.headers["Location"] == first.headers["Location"]
    assert again.headers["Preference-Applied"] == "respond-async"
    assert again.headers["Hotbasis-Replayed"] == "true"
    assert rclient.xlen(STREAM) == 1
    run_jobs(app)
    assert versions(client, mid) == 2


def test_large_models_go_async_without_the_header(redis_url):
    from service.app import create_app

    app = create_app(
        {
            "TESTING": True,
            "REDIS_URL": redis_url,
            "API_KEYS": {key: tenant for tenant, key in TENANT_KEYS.items()},
            "ASYNC_ROWS": 4,  # the juice network has 5 constraints
            "ASYNC_COLUMNS": 0,
            "ASYNC_NONZEROS": 0,
        }
    )
    client = app.test_client()
    resp = client.post("/v1/models", json=juice_network(), headers=auth())
    assert resp.status_code == 202 and "Preference-Applied" not in resp.headers
    run_jobs(app)
    mid = resp.get_json()["model_id"]
    resp = patch(client, mid, CUT)
    assert resp.status_code == 202 and "Preference-Applied" not in resp.headers
    run_jobs(app)
    assert job(client, resp.headers["Location"]).get_json()["version"] == 2
    # a small model stays synchronous
    small = {"variables": {"a": {"cost": 1}}, "constraints": {"c": {"terms": {"a": 1}, "lower": 1}}}
    assert client.post("/v1/models", json=small, headers=auth()).status_code == 201


def test_redelivered_job_after_commit_applies_once(app, client, rclient):
    """The worker's commit records the job id: running the same job again finds its version."""
    mid = new_model(client)
    location = patch(client, mid, CUT, headers=ASYNC).headers["Location"]
    queue = job_queue(app)
    service = app.extensions["hotbasis"].service
    worker = Worker(service, queue, consumer="first", idle_timeout=0.05, block=0.1)
    delivery = queue.next("first", 100, 60_000)
    job_id = location.rsplit("/", 1)[1]
    assert delivery.job_id == job_id
    payload = queue.payload(job_id)
    # the first delivery commits and then "dies": no finish, no acknowledgement
    outcome = worker._run(payload)
    assert outcome.created and outcome.record.version == 2
    assert queue.get(job_id).state == "queued"
    # another consumer takes the idle entry over and completes it without a second version
    other = Worker(service, queue, consumer="second", idle_timeout=0.05, block=0.1)
    import time

    time.sleep(0.1)
    assert other.run_once()
    done = job(client, location).get_json()
    assert done["state"] == "done" and done["version"] == 2
    assert versions(client, mid) == 2
    assert rclient.xlen(STREAM) == 0


def test_model_size_limits_answer_413_before_anything_is_queued(redis_url, rclient):
    from service.app import create_app
    from service.limits import LimitBook, Limits

    app = create_app(
        {
            "TESTING": True,
            "REDIS_URL": redis_url,
            "API_KEYS": {key: tenant for tenant, key in TENANT_KEYS.items()},
            "LIMITS": LimitBook(Limits(rows=6, rate=0)),  # the juice network has 5 constraints
        }
    )
    client = app.test_client()
    mid = new_model(client)
    doc = juice_network()
    doc["constraints"]["one_more"] = {"terms": {"ship_press_north_market": 1}, "upper": 50}
    doc["constraints"]["and_another"] = {"terms": {"ship_press_south_market": 1}, "upper": 50}
    before = snapshot(rclient)
    resp = client.post("/v1/models", json=doc, headers={**auth(), **ASYNC})
    assert resp.status_code == 413 and resp.get_json()["type"].endswith("model-too-large")
    two_rows = {k: doc["constraints"][k] for k in ("one_more", "and_another")}
    resp = patch(client, mid, two_rows, path="/constraints", headers=ASYNC)
    assert resp.status_code == 413
    assert snapshot(rclient) == before


def test_async_create_keeps_the_cold_engine_asked_for(app, client):
    resp = client.post("/v1/models?cold_engine=builtin", json=juice_network(), headers={**auth(), **ASYNC})
    assert resp.status_code == 202
    run_jobs(app)
    done = job(client, resp.headers["Location"]).get_json()
    assert done["state"] == "done" and done["result"]["solve"]["method"] != "cold_highs"
    got = client.get(f"/v1/models/{done['model_id']}", headers=auth()).get_json()
    assert got["cold_engine"] == "builtin"
