"""Shared fixtures: a throwaway real redis-server, the Flask app and its test client."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from pathlib import Path

import pytest
import redis

TENANT_KEYS = {"acme": "acme-test-key-0123456789", "globex": "globex-test-key-9876543210"}


# the pivot log record of the HTTP contract (issue "REST service"); the engine writes these fields
PIVOT_FIELDS = {
    "iteration",
    "algorithm",
    "leaving",
    "entering",
    "pivot",
    "step",
    "objective",
    "primal_infeasibility",
    "dual_infeasibility",
    "bound_flips",
}

def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_redis(
    workdir: Path, appendonly: bool = False, port: int | None = None
) -> tuple[subprocess.Popen, int]:
    """Start redis-server with its files under ``workdir`` on a free loopback port,
    or on ``port`` to restart a stopped server where its clients expect it."""
    binary = os.environ.get("HOTBASIS_REDIS_SERVER") or shutil.which("redis-server")
    if not binary:
        pytest.fail("redis-server is not installed; `bash deploy/local.sh test` installs it (apt-get)")
    workdir.mkdir(parents=True, exist_ok=True)
    fixed_port = port
    for _ in range(1 if fixed_port else 5):
        port = fixed_port or free_port()
        args = [
            binary,
            "--port",
            str(port),
            "--bind",
            "127.0.0.1",
            "--dir",
            str(workdir),
            "--save",
            "",
            "--appendonly",
            "yes" if appendonly else "no",
            "--daemonize",
            "no",
            "--loglevel",
            "warning",
        ]
        proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        client = redis.Redis(host="127.0.0.1", port=port)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                client.ping()
                return proc, port
            except (redis.ConnectionError, redis.BusyLoadingError):  # still loading its AOF
                time.sleep(0.05)
        proc.kill()
        proc.wait()
    pytest.fail(f"could not start redis-server on {'port %d' % fixed_port if fixed_port else 'a free port'}")


def stop_redis(proc: subprocess.Popen) -> None:
    proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory):
    proc, port = start_redis(tmp_path_factory.mktemp("redis"))
    yield f"redis://127.0.0.1:{port}/0"
    stop_redis(proc)


@pytest.fixture
def redis_url(redis_server):
    client = redis.Redis.from_url(redis_server)
    client.flushall()
    client.close()
    return redis_server


@pytest.fixture
def rclient(redis_url):
    client = redis.Redis.from_url(redis_url)
    yield client
    client.close()


@pytest.fixture
def app(redis_url):
    from service.app import create_app

    return create_app(
        {
            "TESTING": True,
            "REDIS_URL": redis_url,
            "API_KEYS": {key: tenant for tenant, key in TENANT_KEYS.items()},
        }
    )


@pytest.fixture
def client(app):
    return app.test_client()


def auth(tenant: str = "acme") -> dict[str, str]:
    return {"Authorization": f"Bearer {TENANT_KEYS[tenant]}"}


def snapshot(client: redis.Redis) -> dict[bytes, bytes]:
    """Every key's serialized value: compare before and after to prove nothing changed.

    Rate-limit buckets (``{hbr:<tenant>}:bucket``) are left out: every request takes a token,
    rejected or not; they hold no model data.
    """
    return {key: client.dump(key) for key in sorted(client.keys("*")) if not key.startswith(b"{hbr:")}


def reference_objective(doc: dict) -> float | None:
    """Optimum of a model document by an independent solver (reference solve: scipy.optimize.linprog, HiGHS)."""
    import numpy as np
    from scipy.optimize import linprog

    names = list(doc["variables"])
    index = {n: j for j, n in enumerate(names)}
    sign = -1.0 if doc.get("sense") == "max" else 1.0
    c = np.array([sign * (v.get("cost") or 0.0) for v in doc["variables"].values()])
    bounds = [(v.get("lower", 0.0), v.get("upper")) for v in doc["variables"].values()]
    a_ub, b_ub = [], []
    for con in doc.get("constraints", {}).values():
        row = np.zeros(len(names))
        for name, coef in con.get("terms", {}).items():
            row[index[name]] = coef
        if con.get("upper") is not None:
            a_ub.append(row)
            b_ub.append(con["upper"])
        if con.get("lower") is not None:
            a_ub.append(-row)
            b_ub.append(-con["lower"])
    res = linprog(
        c,
        A_ub=np.array(a_ub) if a_ub else None,
        b_ub=np.array(b_ub) if b_ub else None,
        bounds=bounds,
        method="highs",
    )
    if res.status != 0:
        return None
    return sign * res.fun + (doc.get("objective_offset") or 0.0)


def juice_network() -> dict:
    """A small two-press, three-buyer juice distribution plan (invented), minimizing cost."""
    presses = {"press_north": 70, "press_south": 60}
    buyers = {"cafe_a": 30, "cafe_b": 25, "market": 45}
    cost = {
        ("press_north", "cafe_a"): 4, ("press_north", "cafe_b"): 6, ("press_north", "market"): 5,
        ("press_south", "cafe_a"): 7, ("press_south", "cafe_b"): 3, ("press_south", "market"): 4,
    }  # fmt: skip
    variables = {f"ship_{p}_{b}": {"cost": cost[p, b]} for p in presses for b in buyers}
    constraints = {}
    for p, cap in presses.items():
        constraints[f"capacity_{p}"] = {"terms": {f"ship_{p}_{b}": 1 for b in buyers}, "upper": cap}
    for b, need in buyers.items():
        constraints[f"demand_{b}"] = {"terms": {f"ship_{p}_{b}": 1 for p in presses}, "lower": need}
    return {"name": "juice network", "sense": "min", "variables": variables, "constraints": constraints}
