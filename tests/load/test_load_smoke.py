"""A short version of the load run for CI: 4 clients x 10 s against a real gunicorn, zero errors.

Figures are not asserted here (the machine is shared and the run is short); the measured comparison
is tests/load/run.py, described in README.md ("Load").
"""

from __future__ import annotations

import json
import os
import signal
import subprocess

import numpy as np
import pytest
from conftest import free_port, start_redis, stop_redis
from live_service import start_gunicorn, wait_ready

from service.scenarios.supply_chain import cutting_capacity_row, sized
from tests.load.peer import solve_document
from tests.load.run import ROOT, run_locust
from tests.load.scenario import CutMaker, client_model

KEY = "load-smoke-key-0123456789abcdef"
pytestmark = pytest.mark.slow


def test_cut_maker_chooses_the_rows_cutting_capacity_row_chooses():
    lp = sized(300, seed=2)
    rng = np.random.default_rng(0)
    x = rng.uniform(0, 10, lp.n)
    maker = CutMaker(lp)
    for seed in range(12):
        ours, reference = maker.cut(x, seed, sequence=seed), cutting_capacity_row(lp, x, seed=seed)
        assert ours.name == f"{reference.name}#{seed}"
        assert ours.upper == pytest.approx(reference.upper)
        assert ours.terms == {lp.col_names[j]: a for j, a in zip(reference.columns, reference.coefficients)}
        assert reference.violation(x) > 0  # the new row cuts off the plan it was made from


def test_peer_solves_the_document_to_the_engine_optimum():
    from service.lp import solve
    from service.lp.result import SolveOptions

    model = client_model(5, rows=300)
    answer = solve_document(json.loads(model.document))
    # reference solve: the service's own cold solve (HiGHS via highspy) of the same LinearProgram
    assert answer["objective"] == pytest.approx(solve(model.lp, SolveOptions()).objective, rel=1e-9)


def test_short_load_run_has_no_errors(tmp_path):
    redis_proc, redis_port = start_redis(tmp_path / "redis")
    port = free_port()
    env = {**os.environ, "PORT": str(port), "HOTBASIS_REDIS_URL": f"redis://127.0.0.1:{redis_port}/0",
           "HOTBASIS_API_KEYS": f"load:{KEY}", "PYTHONPATH": str(ROOT),
           # one tenant drives every client: measure the service, not the per-tenant rate limit
           "HOTBASIS_LIMIT_RATE": "0"}  # fmt: skip
    api = start_gunicorn(env, subprocess.DEVNULL)
    try:
        assert wait_ready(f"http://127.0.0.1:{port}", api), "gunicorn did not start"
        figures = run_locust(
            "HotbasisClient", f"http://127.0.0.1:{port}", 4, 14,
            {**env, "LOAD_API_KEY": KEY, "LOAD_ROWS": "500"},
        )  # fmt: skip
    finally:
        api.send_signal(signal.SIGTERM)
        api.wait(timeout=30)
        stop_redis(redis_proc)
    assert figures["clients_ready"] == 4
    assert figures["errors"] == 0
    assert figures["changes_ok"] > 0
    assert figures["methods"].keys() <= {"dual", "none"}  # added rows: warm dual simplex, never a fallback
