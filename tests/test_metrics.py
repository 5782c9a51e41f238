"""/metrics in one process (Flask test client): request, re-optimization and job queue figures."""

from __future__ import annotations

import time

import pytest
import redis
from redis.backoff import NoBackoff
from redis.retry import Retry
from conftest import auth, free_port, juice_network
from prometheus_client.parser import text_string_to_metric_families

from service.metrics import QueueCollector, method_label, queue_stats, render

MERGE = "application/merge-patch+json"


def scrape(client) -> dict[tuple[str, tuple], float]:
    resp = client.get("/metrics")
    assert resp.status_code == 200
    assert resp.headers["Content-Type"].startswith("text/plain")
    out = {}
    for family in text_string_to_metric_families(resp.get_data(as_text=True)):
        for sample in family.samples:
            out[sample.name, tuple(sorted(sample.labels.items()))] = sample.value
    return out


def value(samples: dict, name: str, **labels: str) -> float:
    return samples.get((name, tuple(sorted(labels.items()))), 0.0)


def test_requests_counted_by_route_template_and_status(client):
    before = scrape(client)
    created = client.post("/v1/models", json=juice_network(), headers=auth())
    assert created.status_code == 201
    model_id = created.get_json()["id"]
    assert client.get(f"/v1/models/{model_id}", headers=auth()).status_code == 200
    assert client.get("/v1/models/no-such-model", headers=auth()).status_code == 404
    assert client.get("/no/such/route").status_code == 404
    after = scrape(client)

    route = "/v1/models/<model_id>"
    counts = "hotbasis_http_requests_total"
    assert (
        value(after, counts, method="GET", route=route, status="200")
        - value(before, counts, method="GET", route=route, status="200")
        == 1
    )
    assert (
        value(after, counts, method="GET", route=route, status="404")
        - value(before, counts, method="GET", route=route, status="404")
        == 1
    )
    assert value(after, counts, method="GET", route="<unmatched>", status="404") >= 1
    assert value(after, counts, method="POST", route="/v1/models", status="201") >= 1
    hist = "hotbasis_http_request_duration_seconds_count"
    assert value(after, hist, method="POST", route="/v1/models", status="201") >= 1
    # no model ids (and so nothing about any tenant's models) in the exposition
    text = client.get("/metrics").get_data(as_text=True)
    assert model_id not in text and "acme" not in text


def test_reoptimizations_by_method_and_pivots(client):
    before = scrape(client)
    created = client.post("/v1/models", json=juice_network(), headers=auth())
    model_id = created.get_json()["id"]
    # cap the busiest press at half of what the cold plan ships from it: the plan is cut -> warm dual simplex
    plan = created.get_json()["solution"]["variables"]
    shipped = {p: sum(v["value"] for n, v in plan.items() if n.startswith(f"ship_{p}_"))
               for p in ("press_north", "press_south")}  # fmt: skip
    press = max(shipped, key=shipped.get)
    terms = {name: 1 for name in plan if name.startswith(f"ship_{press}_")}
    cut = {"constraints": {"press_cap": {"terms": terms, "upper": shipped[press] / 2}}}
    resp = client.patch(f"/v1/models/{model_id}", json=cut, headers={**auth(), "Content-Type": MERGE})
    assert resp.status_code == 200, resp.get_json()
    solve = resp.get_json()["solve"]
    assert solve["method"] == "dual" and solve["pivots"] >= 1
    # a replay of nothing (same patch again changes nothing) stores nothing and counts nothing
    again = client.patch(f"/v1/models/{model_id}", json=cut, headers={**auth(), "Content-Type": MERGE})
    assert again.status_code == 200
    after = scrape(client)

    reopt = "hotbasis_reoptimizations_total"
    assert (
        value(after, reopt, method="cold", fallback_reason="")
        - value(before, reopt, method="cold", fallback_reason="")
        == 1
    )
    assert (
        value(after, reopt, method="warm_dual", fallback_reason="")
        - value(before, reopt, method="warm_dual", fallback_reason="")
        == 1
    )
    pivots_sum = "hotbasis_reoptimization_pivots_sum"
    assert value(after, pivots_sum, method="warm_dual") - value(
        before, pivots_sum, method="warm_dual"
    ) == pytest.approx(solve["pivots"])


def test_method_labels():
    assert method_label({"method": "dual", "fallback": None}) == ("warm_dual", "")
    assert method_label({"method": "primal"}) == ("warm_primal", "")
    assert method_label({"method": "dual+primal"}) == ("warm_dual_primal", "")
    assert method_label({"method": "cold_builtin"}) == ("cold", "")
    assert method_label({"method": "cold_highs", "fallback": {"reason": "singular_basis"}}) == (
        "fallback",
        "singular_basis",
    )


def test_request_id_accepted_echoed_and_replaced_when_unusable(client):
    resp = client.get("/healthz", headers={"X-Request-ID": "erp-batch-7/line-12"})
    assert resp.headers["X-Request-ID"] == "erp-batch-7/line-12"
    bad = client.get("/healthz", headers={"X-Request-ID": "has space"})
    made = bad.headers["X-Request-ID"]
    assert made != "has space" and len(made) == 32
    assert client.get("/healthz").headers["X-Request-ID"] != made  # a new id per request


def test_queue_stats_from_a_real_stream(rclient):
    stream, group = "hb-test:jobs", "workers"
    t0 = time.time()
    ids = [rclient.xadd(stream, {"job": str(k)}) for k in range(5)]
    stats = queue_stats(rclient, stream, group, now=t0 + 10)
    assert stats["length"] == 5 and stats["waiting"] == 5 and stats["pending"] == 0
    assert 9.0 <= stats["oldest_age_seconds"] <= 11.0
    rclient.xgroup_create(stream, group, id="0")
    got = rclient.xreadgroup(group, "w1", {stream: ">"}, count=2)
    assert len(got[0][1]) == 2
    stats = queue_stats(rclient, stream, group)
    assert stats["waiting"] == 3 and stats["pending"] == 2 and stats["length"] == 5
    rclient.xack(stream, group, *ids[:2])
    # the oldest outstanding job is now the third one: its id carries the time it was added
    third_ms = int(ids[2].decode().split("-")[0])
    stats = queue_stats(rclient, stream, group, now=third_ms / 1000 + 3)
    assert stats["pending"] == 0 and stats["waiting"] == 3
    assert stats["oldest_age_seconds"] == pytest.approx(3.0, abs=1e-3)
    rclient.xreadgroup(group, "w1", {stream: ">"})
    rclient.xack(stream, group, *ids[2:])
    stats = queue_stats(rclient, stream, group)
    assert stats == {"length": 5, "waiting": 0, "pending": 0, "oldest_age_seconds": 0.0}
    assert queue_stats(rclient, "hb-test:absent", group)["length"] == 0


def test_queue_figures_in_the_scrape_and_a_dead_redis_never_fails_it(rclient):
    stream, group = "hb-test:jobs2", "workers"
    rclient.xadd(stream, {"job": "1"})
    text = render([QueueCollector(lambda: (rclient, stream, group))]).decode()
    assert "hotbasis_job_queue_up 1.0" in text and "hotbasis_job_queue_length 1.0" in text
    dead = redis.Redis(
        host="127.0.0.1", port=free_port(), socket_connect_timeout=0.5, retry=Retry(NoBackoff(), 0)
    )
    text = render([QueueCollector(lambda: (dead, stream, group))]).decode()
    assert "hotbasis_job_queue_up 0.0" in text and "hotbasis_job_queue_length" not in text


def test_metrics_answer_while_redis_is_unreachable():
    from service.app import create_app

    app = create_app({"TESTING": True, "REDIS_URL": f"redis://127.0.0.1:{free_port()}/0", "API_KEYS": {}})
    resp = app.test_client().get("/metrics")
    assert resp.status_code == 200 and b"hotbasis_http_requests_total" in resp.data


def test_scrape_reads_the_job_stream_named_by_the_jobs_module(client, rclient):
    jobs = pytest.importorskip("service.jobs")  # the queue module (async jobs)
    STREAM, GROUP = jobs.STREAM, jobs.GROUP

    rclient.xgroup_create(STREAM, GROUP, id="0", mkstream=True)
    for k in range(3):
        rclient.xadd(STREAM, {"job": f"job-{k}"})
    rclient.xreadgroup(GROUP, "metrics-test", {STREAM: ">"}, count=1)
    samples = scrape(client)
    assert value(samples, "hotbasis_job_queue_up") == 1
    assert value(samples, "hotbasis_job_queue_length") == 3
    assert value(samples, "hotbasis_job_queue_waiting") == 2
    assert value(samples, "hotbasis_job_queue_pending") == 1
    assert value(samples, "hotbasis_job_queue_oldest_age_seconds") >= 0
