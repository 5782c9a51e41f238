"""service.client against a real gunicorn + redis-server + worker: error mapping, retries, job waiting."""

from __future__ import annotations


import pytest
from conftest import free_port, juice_network, reference_objective, start_redis, stop_redis
from live_service import start_service, stop_service

from service.client import HotbasisClient, ProblemError, RetryPolicy, ServiceUnreachable

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    svc = start_service(tmp_path_factory.mktemp("client-live"), appendonly=True)
    yield svc
    stop_service(svc)


@pytest.fixture
def hb(live):
    return HotbasisClient(live.base, api_key=live.key, timeout=30)


def test_problem_details_are_mapped_to_the_exception(hb):
    created = hb.create(juice_network())
    assert created.status == 201 and created.etag == '"v1"' and created.model_id
    with pytest.raises(ProblemError) as err:
        hb.patch_constraints(created.model_id, {"c9": {"terms": {"no_such_lane": 1}, "upper": 3}})
    exc = err.value
    assert exc.status == 400 and exc.slug == "invalid-document" and exc.title
    assert exc.pointers == ["/c9/terms/no_such_lane"]  # relative to the map that was sent
    with pytest.raises(ProblemError) as err:
        hb.patch(created.model_id, {"constraints": {"demand_cafe_a": {"lower": 31}}}, if_match='"v9"')
    assert err.value.status == 412 and err.value.headers["etag"] == '"v1"'
    assert err.value.problem["current_version"] == 1
    with pytest.raises(ProblemError) as err:
        hb.get("no-such-model")
    assert err.value.status == 404 and err.value.slug == "model-not-found"
    with pytest.raises(ProblemError) as err:
        HotbasisClient(hb.base_url, api_key="wrong-key-000000000000").list_models()
    assert err.value.status == 401 and "www-authenticate" in err.value.headers


def test_patch_with_key_replays_and_versions_read_back(hb):
    doc = juice_network()
    created = hb.create(doc)
    patch = {"demand_market": {"lower": 50}}
    first = hb.patch_constraints(created.model_id, patch, idempotency_key="client-k1", if_match=created.etag)
    again = hb.patch_constraints(created.model_id, patch, idempotency_key="client-k1", if_match=created.etag)
    assert not first.replayed and again.replayed and again.body == first.body
    doc["constraints"]["demand_market"]["lower"] = 50
    assert first.body["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)  # reference: linprog
    assert [v["version"] for v in hb.versions(created.model_id).body["versions"]] == [2, 1]
    assert hb.version(created.model_id, 1).body["result"]["objective"] == created.body["objective"]
    assert "ROWS" in hb.export_mps(created.model_id)


def test_wait_for_an_async_patch_reports_progress(hb):
    doc = juice_network()
    created = hb.create(doc)
    accepted = hb.patch_variables(
        created.model_id, {"ship_press_north_market": {"upper": 5}}, respond_async=True
    )
    assert accepted.accepted and accepted.location.startswith("/v1/jobs/")
    seen = []
    final = hb.wait(accepted, on_progress=lambda job, elapsed: seen.append((job["state"], elapsed)))
    assert seen[-1][0] == "done" and all(s in ("queued", "running", "done") for s, _ in seen)
    assert final.status == 200 and final.job["version"] == 2 and final.body["version"] == 2
    doc["variables"]["ship_press_north_market"]["upper"] = 5
    assert final.body["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)  # reference: linprog


def test_connection_failures_retry_only_safe_requests():
    waits: list[float] = []
    hb = HotbasisClient(f"http://127.0.0.1:{free_port()}", api_key="k" * 20, timeout=2,
                        retry=RetryPolicy(attempts=3, connect_backoff=0.01))  # fmt: skip
    hb.sleep = waits.append
    with pytest.raises(ServiceUnreachable):
        hb.list_models()
    assert len(waits) == 2  # three attempts
    waits.clear()
    with pytest.raises(ServiceUnreachable):
        hb.create(juice_network())  # no Idempotency-Key: never retried
    assert waits == []
    with pytest.raises(ServiceUnreachable):
        hb.create(juice_network(), idempotency_key="safe-to-repeat")
    assert len(waits) == 2


def test_503_with_retry_after_is_retried_until_storage_is_back(live, hb):
    created = hb.create(juice_network())
    waits: list[float] = []

    def wait_and_restart(seconds: float) -> None:
        waits.append(seconds)
        if len(waits) == 2:  # Redis comes back (from its append-only file) after the second 503
            live.redis, _ = start_redis_on(live.redis_dir, live.redis_port)

    hb.sleep = wait_and_restart
    stop_redis(live.redis)
    answer = hb.get(created.model_id)  # 503 + Retry-After while Redis is down, then 200
    assert answer.status == 200 and answer.body["version"] == 1
    assert len(waits) == 2 and all(0 < w <= hb.retry.max_wait for w in waits)

    stop_redis(live.redis)
    hb.sleep = waits.append
    waits.clear()
    try:
        with pytest.raises(ProblemError) as err:
            hb.get(created.model_id)
        assert err.value.status == 503 and len(waits) == hb.retry.attempts - 1
    finally:
        live.redis, _ = start_redis_on(live.redis_dir, live.redis_port)


def start_redis_on(workdir, port):
    """Restart redis-server on its old port and directory (same AOF), so the service reconnects."""
    return start_redis(workdir, appendonly=True, port=port)
