"""The builtin simplex against the Netlib LP collection.

Outside checks:
- cold solves against the collection's published optimal values
  (shared/data/netlib/optimal.csv);
- warm re-optimizations after each change set of tests/lp/changes.py against
  a cold reference solve of the changed model with HiGHS (via highspy).
"""

from __future__ import annotations

import zlib
from functools import lru_cache

import numpy as np
import pytest

from service.lp import SolveOptions, remap, reoptimize, solve
from service.lp.check import verify_farkas
from service.lp.mps import read_mps
from tests.lp.changes import SCENARIOS
from tests.lp.netlib import netlib_problems

PROBLEMS = netlib_problems()
IDS = [p.name for p in PROBLEMS]

# Which algorithm a change set should wake. Removing a binding row can leave
# the repaired basis primal or dual infeasible or both, so any is accepted.
EXPECTED_METHODS = {
    "a_one_cut": {"dual"},
    "b_three_cuts": {"dual"},
    "c_profitable_column": {"primal"},
    "d_bound_and_rhs": {"dual"},
    "e_changed_costs": {"primal", "none"},
    "f_removed_constraint": {"dual", "primal", "dual+primal", "none"},
    "g_primal_and_dual_broken": {"dual+primal", "dual"},
}


@lru_cache(maxsize=None)
def _model(name: str):
    problem = next(p for p in PROBLEMS if p.name == name)
    return read_mps(problem.path)


@lru_cache(maxsize=None)
def _highs_solution(name: str):
    return solve(_model(name))


def _rel(a: float, b: float) -> float:
    return abs(a - b) / max(1.0, abs(b))


@pytest.mark.parametrize("problem", PROBLEMS, ids=IDS)
def test_builtin_cold_solve_matches_published_optimum(problem):
    lp = _model(problem.name)
    res = solve(lp, SolveOptions(engine="builtin"))
    assert res.status == "optimal"
    assert res.fallback is None, res.fallback
    assert res.method == "cold_builtin"
    assert res.check["passed"]
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert _rel(res.objective, problem.optimum) <= 1e-6
    assert res.basis.basic_count() == lp.m


@pytest.mark.parametrize("problem", PROBLEMS, ids=IDS)
def test_highs_cold_solve_matches_published_optimum(problem):
    res = _highs_solution(problem.name)
    assert res.status == "optimal"
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert _rel(res.objective, problem.optimum) <= 1e-6


@pytest.mark.parametrize("scenario", sorted(SCENARIOS))
@pytest.mark.parametrize("problem", PROBLEMS, ids=IDS)
def test_warm_reoptimization_matches_cold_reference(problem, scenario):
    lp = _model(problem.name)
    base = _highs_solution(problem.name)
    rng = np.random.default_rng(zlib.crc32(f"{problem.name}/{scenario}".encode()))
    changed = SCENARIOS[scenario](lp, base, rng)
    basis, _ = remap(base.basis, lp.col_names, lp.row_names, changed)

    res = reoptimize(changed, basis, SolveOptions())
    ref = solve(changed)  # reference: cold HiGHS solve of the changed model

    assert res.fallback is None, res.fallback
    assert res.warm
    assert res.status == ref.status
    assert res.check["passed"], res.check
    assert res.method in EXPECTED_METHODS[scenario]
    if ref.status == "optimal":
        assert _rel(res.objective, ref.objective) <= 1e-6
        assert res.basis.basic_count() == changed.m
    elif ref.status == "infeasible":
        assert verify_farkas(changed, res.farkas)["passed"]
    # the pivot log tells the same story as the pivot count
    pivots = [r for r in res.pivot_log if "event" not in r]
    assert len(pivots) + res.log_dropped == res.pivots
