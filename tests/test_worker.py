"""Crash safety of the queue workers: real worker processes, a real redis-server, kill -9 and SIGTERM.

The workers are ``python -m service.worker`` subprocesses. The test-only hook
HOTBASIS_WORKER_TEST_PAUSE="<where>:<seconds>" holds a worker at one point of a
job (before the commit, or after the commit and before the acknowledgement) so
the test can kill it exactly there. The idle timeout after which another
worker takes a job over is 1.5 s here (60 s by default).
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import orjson
import pytest
import redis
from conftest import TENANT_KEYS, auth, juice_network

from service.document import to_document
from service.jobs import GROUP, STREAM
from service.scenarios.supply_chain import cutting_capacity_row, sized

ROOT = Path(__file__).resolve().parents[1]
IDLE_TIMEOUT = 1.5
PAUSE = 2.5

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def plan_model():
    """A ~2,000-row supply-chain model and its document (generated once for the module)."""
    lp = sized(2000)
    return lp, to_document(lp)


class Workers:
    """Worker subprocesses of one test; every one still running is killed at the end."""

    def __init__(self, redis_url: str, tmp: Path) -> None:
        self.redis_url = redis_url
        self.tmp = tmp
        self.procs: list[subprocess.Popen] = []
        self.r = redis.Redis.from_url(redis_url)

    def start(self, count: int, pause: str | None = None, extra_env: dict | None = None) -> list[subprocess.Popen]:
        env = {
            **os.environ,
            "HOTBASIS_REDIS_URL": self.redis_url,
            "HOTBASIS_API_KEYS": ",".join(f"{t}:{k}" for t, k in TENANT_KEYS.items()),
            "HOTBASIS_JOB_IDLE_TIMEOUT": str(IDLE_TIMEOUT),
            "HOTBASIS_JOB_BLOCK": "0.2",
            "HOTBASIS_LOG_LEVEL": "INFO",
            "PYTHONPATH": str(ROOT),
        }
        env.pop("HOTBASIS_WORKER_TEST_PAUSE", None)
        env.update(extra_env or {})
        if pause:
            env["HOTBASIS_WORKER_TEST_PAUSE"] = pause
        started = []
        for _ in range(count):
            log = open(self.tmp / f"worker-{len(self.procs)}.log", "wb")
            proc = subprocess.Popen(
                [sys.executable, "-m", "service.worker"], cwd=ROOT, env=env, stdout=log, stderr=log
            )
            self.procs.append(proc)
            started.append(proc)
        self.wait_consumers(len(self.procs))
        return started

    def consumers(self) -> list[str]:
        try:
            return [c["name"].decode() for c in self.r.xinfo_consumers(STREAM, GROUP)]
        except redis.ResponseError:  # no stream or group yet
            return []

    def wait_consumers(self, count: int, timeout: float = 30.0) -> None:
        """Until ``count`` worker processes have read from the group (they are then waiting for jobs)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            alive = {str(p.pid) for p in self.procs if p.poll() is None}
            if len({c.split(":")[1] for c in self.consumers()} & alive) >= count:
                return
            time.sleep(0.05)
        raise AssertionError(f"workers did not start; logs in {self.tmp}")

    def by_consumer(self, consumer: str) -> subprocess.Popen:
        pid = int(consumer.split(":")[1])
        return next(p for p in self.procs if p.pid == pid)

    def stop_all(self) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                proc.kill()
            proc.wait()
        self.r.close()


@pytest.fixture
def workers(redis_url, tmp_path):
    pool = Workers(redis_url, tmp_path)
    yield pool
    pool.stop_all()


def wait_for(check, timeout: float, what: str):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = check()
        if value:
            return value
        time.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what}")


def create_and_queue_cut(client, plan_model) -> tuple[str, str, str]:
    """Create the big model synchronously, then queue an async PATCH that adds a violated constraint."""
    lp, doc = plan_model
    resp = client.post(
        "/v1/models?fields=solution&solution=full",
        data=orjson.dumps(doc),
        content_type="application/json",
        headers=auth(),
    )
    assert resp.status_code == 201, resp.get_data(as_text=True)[:500]
    body = resp.get_json()
    values = body["solution"]["variables"]
    x = np.array([values[name]["value"] for name in lp.col_names])
    cut = cutting_capacity_row(lp, x, seed=1, kind="outage")
    terms = {lp.col_names[j]: float(a) for j, a in zip(cut.columns, cut.coefficients)}
    row = {
        "terms": terms,
        "lower": None if math.isinf(cut.lower) else cut.lower,
        "upper": None if math.isinf(cut.upper) else cut.upper,
    }
    resp = client.patch(
        f"/v1/models/{body['id']}?fields=solve,changes",
        data=orjson.dumps({"constraints": {cut.name: row}}),
        content_type="application/merge-patch+json",
        headers={**auth(), "Prefer": "respond-async"},
    )
    assert resp.status_code == 202
    return body["id"], resp.headers["Location"], cut.name


def job_of(client, location) -> dict:
    return client.get(location, headers=auth()).get_json()


def versions(client, mid) -> list[dict]:
    return client.get(f"/v1/models/{mid}/versions", headers=auth()).get_json()["versions"]


def assert_done_once(client, rclient, mid, location, cut_name, kept_versions=(2, 1)) -> dict:
    done = job_of(client, location)
    assert done["state"] == "done", done
    assert done["version"] == 2 and done["result"]["version"] == 2
    assert done["result"]["status"] == "optimal" and done["result"]["solve"]["warm"] is True
    assert done["result"]["changes"]["model"]["rows_added"] == [cut_name]
    kept = versions(client, mid)
    assert [v["version"] for v in kept] == list(kept_versions)  # exactly one new version from the job
    assert rclient.xlen(STREAM) == 0 and rclient.xpending(STREAM, GROUP)["pending"] == 0
    return done


def test_kill_9_before_commit_the_job_completes_on_the_other_worker(client, rclient, workers, plan_model):
    workers.start(2, pause=f"before_commit:{PAUSE}")
    mid, location, cut_name = create_and_queue_cut(client, plan_model)
    running = wait_for(
        lambda: (j := job_of(client, location))["state"] == "running" and j, 20, "the job to start"
    )
    first = workers.by_consumer(running["worker"])
    time.sleep(0.5)  # inside the pause: solved, not committed
    assert len(versions(client, mid)) == 1
    first.send_signal(signal.SIGKILL)
    first.wait()
    killed_at = time.monotonic()
    done = wait_for(lambda: (j := job_of(client, location))["state"] == "done" and j, 30, "the job to finish")
    taken_over_after = time.monotonic() - killed_at
    assert done["attempts"] == 2
    assert taken_over_after >= IDLE_TIMEOUT - 0.6  # not before the idle timeout (less the 0.5 s above)
    assert_done_once(client, rclient, mid, location, cut_name)


def test_kill_9_after_commit_before_ack_does_not_apply_twice(client, rclient, workers, plan_model):
    workers.start(2, pause=f"after_commit:{PAUSE}")
    mid, location, cut_name = create_and_queue_cut(client, plan_model)
    wait_for(lambda: len(versions(client, mid)) == 2, 20, "the first commit")
    running = job_of(client, location)
    assert running["state"] == "running"  # committed, not finished
    # a planner moves the new constraint's bound meanwhile (version 3); merge patches repeat harmlessly on
    # their own, so only the job id recorded with version 2 keeps the redelivered job from undoing this
    model = client.get(f"/v1/models/{mid}", headers=auth()).get_json()["model"]
    bound = model["constraints"][cut_name]
    moved = {
        "lower": None if bound["lower"] is None else bound["lower"] * 0.99,
        "upper": None if bound["upper"] is None else bound["upper"] * 1.01,
    }
    resp = client.patch(
        f"/v1/models/{mid}",
        data=orjson.dumps({"constraints": {cut_name: moved}}),
        content_type="application/merge-patch+json",
        headers=auth(),
    )
    assert resp.status_code == 200 and resp.get_json()["version"] == 3
    first = workers.by_consumer(running["worker"])
    first.send_signal(signal.SIGKILL)
    first.wait()
    done = wait_for(lambda: (j := job_of(client, location))["state"] == "done" and j, 30, "the job to finish")
    assert done["attempts"] == 2
    assert_done_once(client, rclient, mid, location, cut_name, kept_versions=(3, 2, 1))
    after = client.get(f"/v1/models/{mid}", headers=auth()).get_json()["model"]["constraints"][cut_name]
    assert (after["lower"], after["upper"]) == (moved["lower"], moved["upper"])  # the later change stands


def test_sigterm_finishes_the_job_in_hand_then_exits(client, rclient, workers, plan_model):
    (worker,) = workers.start(1, pause="before_commit:1.5")
    mid, location, cut_name = create_and_queue_cut(client, plan_model)
    wait_for(lambda: job_of(client, location)["state"] == "running", 20, "the job to start")
    worker.send_signal(signal.SIGTERM)
    assert worker.wait(timeout=30) == 0
    done = assert_done_once(client, rclient, mid, location, cut_name)
    assert done["attempts"] == 1


def test_sigterm_stops_an_idle_worker_promptly(workers):
    (worker,) = workers.start(1)
    t = time.monotonic()
    worker.send_signal(signal.SIGTERM)
    assert worker.wait(timeout=10) == 0
    assert time.monotonic() - t < 3.0


def test_worker_waits_out_a_redis_outage_and_runs_the_next_job(tmp_path):
    """Redis killed (-9) and restarted on its AOF: the worker keeps running and takes the next job."""
    from storage.servers import start_single

    from service.app import create_app

    server = start_single(tmp_path / "redis", ["--appendonly", "yes", "--appendfsync", "always"])
    pool = Workers(server.url, tmp_path)
    try:
        app = create_app(
            {"TESTING": True, "REDIS_URL": server.url,
             "API_KEYS": {key: tenant for tenant, key in TENANT_KEYS.items()}}
        )  # fmt: skip
        client = app.test_client()
        mid = client.post("/v1/models", json=juice_network(), headers=auth()).get_json()["id"]
        (worker,) = pool.start(1)
        server.kill()
        time.sleep(2.0)  # the worker's reads fail meanwhile; it backs off and retries
        assert worker.poll() is None
        server.start()
        cut = {"constraints": {"lane_cap": {"terms": {"ship_press_south_market": 1}, "upper": 20}}}
        resp = client.patch(
            f"/v1/models/{mid}", data=orjson.dumps(cut), content_type="application/merge-patch+json",
            headers={**auth(), "Prefer": "respond-async"},
        )  # fmt: skip
        assert resp.status_code == 202
        done = wait_for(
            lambda: (j := job_of(client, resp.headers["Location"]))["state"] == "done" and j, 30, "the job"
        )
        assert done["version"] == 2 and done["result"]["objective"] == pytest.approx(
            400.0
        )  # as test_patch.py
        worker.send_signal(signal.SIGTERM)
        assert worker.wait(timeout=15) == 0
    finally:
        pool.stop_all()
        server.stop()


def test_a_worker_serves_the_reoptimizations_it_stored_on_its_metrics_port(client, workers, plan_model):
    """Workers run no API, so the API's /metrics cannot see their solves: each worker serves its
    own (HOTBASIS_WORKER_METRICS_PORT), and an async change shows up there, counted once."""
    from conftest import free_port

    port = free_port()
    workers.start(1, extra_env={"HOTBASIS_WORKER_METRICS_PORT": str(port), "HOTBASIS_WORKER_METRICS_BIND": "127.0.0.1"})

    def scrape() -> str:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
            assert resp.headers["Content-Type"].startswith("text/plain")
            return resp.read().decode()

    def dual_count(text: str) -> float:
        return sum(
            float(line.rsplit(" ", 1)[1])
            for line in text.splitlines()
            if line.startswith("hotbasis_reoptimizations_total{") and 'method="warm_dual"' in line
        )

    before = dual_count(wait_for(scrape, 30, "the worker's metrics port"))
    _mid, location, _cut = create_and_queue_cut(client, plan_model)
    wait_for(lambda: job_of(client, location)["state"] == "done", 120, "the job")
    assert dual_count(scrape()) == before + 1
