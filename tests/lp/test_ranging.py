"""Sensitivity ranging: textbook values, HiGHS's ranging, and re-solves."""

from __future__ import annotations

from functools import lru_cache

import highspy
import numpy as np
import pytest
import scipy.sparse as sp

from service.lp import LinearProgram, SolveOptions, Status, reoptimize, solve
from service.lp.highs_cold import _new_highs, _ranging_from, import_basis
from service.lp.mps import read_mps
from service.lp.ranging import compute_ranging
from tests.lp.netlib import netlib_problems

PROBLEMS = netlib_problems()


def wyndor() -> LinearProgram:
    # Textbook: Hillier & Lieberman, "Introduction to Operations Research"
    # (7th ed., 2001), the Wyndor Glass Co. product-mix example:
    # max 3 x1 + 5 x2, x1 <= 4, 2 x2 <= 12, 3 x1 + 2 x2 <= 18.
    A = sp.csc_matrix(np.array([[1.0, 0.0], [0.0, 2.0], [3.0, 2.0]]))
    return LinearProgram(
        A, [3.0, 5.0], [0.0, 0.0], [np.inf, np.inf], [-np.inf] * 3, [4.0, 12.0, 18.0], sense=-1,
        col_names=["doors", "windows"], row_names=["plant1", "plant2", "plant3"],
    )  # fmt: skip


@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_wyndor_ranges_match_the_textbook(engine):
    res = solve(wyndor(), SolveOptions(engine=engine))
    rg = compute_ranging(wyndor(), res.basis, res.x, res.shadow_price, res.reduced_cost)
    # Textbook sensitivity report for Wyndor (values from memory):
    # 0 <= c1 <= 7.5, c2 >= 2; b1 >= 2, 6 <= b2 <= 18, 12 <= b3 <= 24.
    np.testing.assert_allclose(rg.cost_lower, [0.0, 2.0], atol=1e-9)
    np.testing.assert_allclose(rg.cost_upper, [7.5, np.inf])
    np.testing.assert_allclose(rg.rhs_lower, [2.0, 6.0, 12.0], atol=1e-9)
    np.testing.assert_allclose(rg.rhs_upper, [np.inf, 18.0, 24.0])


def test_ranging_option_fills_the_result():
    res = solve(wyndor(), SolveOptions(engine="builtin", ranging=True))
    assert res.ranging is not None
    np.testing.assert_allclose(res.ranging.cost_upper, [7.5, np.inf])


@lru_cache(maxsize=None)
def _highs_reference(name: str):
    """HiGHS's optimal basis (no presolve) and its own ranging on that basis."""
    problem = next(p for p in PROBLEMS if p.name == name)
    lp = read_mps(problem.path)
    h = _new_highs(lp, SolveOptions(), presolve=False)
    h.run()
    assert h.getModelStatus() == highspy.HighsModelStatus.kOptimal
    sol = h.getSolution()
    x = np.asarray(sol.col_value)
    activity = np.asarray(sol.row_value)
    y = np.asarray(sol.row_dual)  # all shared Netlib models minimize: HiGHS's sign is ours
    assert lp.sense == 1
    basis = import_basis(h.getBasis(), lp, x, activity)
    return lp, basis, x, y, _ranging_from(h, lp)


def _same(a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> tuple[int, int]:
    a, b = a[mask], b[mask]
    inf_mismatch = int((np.isfinite(a) != np.isfinite(b)).sum())
    both = np.isfinite(a) & np.isfinite(b)
    rel = np.abs(a[both] - b[both]) / np.maximum(1.0, np.abs(b[both]))
    return inf_mismatch, int((rel > 1e-6).sum())


@pytest.mark.parametrize("problem", PROBLEMS, ids=[p.name for p in PROBLEMS])
def test_ranging_agrees_with_highs_on_netlib(problem):
    lp, basis, x, y, ref = _highs_reference(problem.name)
    d = lp.c - lp.A.T @ y
    ours = compute_ranging(lp, basis, x, y, d)
    every_col = np.ones(lp.n, dtype=bool)
    # Reference: HiGHS getRanging() at the same basis.
    assert _same(ours.cost_lower, ref.cost_lower, every_col) == (0, 0)
    assert _same(ours.cost_upper, ref.cost_upper, every_col) == (0, 0)
    # For binding rows both report the bound interval keeping the basis
    # primal feasible. For rows that are not binding HiGHS reports another
    # quantity; ours is the textbook one, tested below against the activity.
    binding = basis.row_status != Status.BASIC
    assert _same(ours.rhs_lower, ref.rhs_lower, binding) == (0, 0)
    assert _same(ours.rhs_upper, ref.rhs_upper, binding) == (0, 0)
    slack = ~binding
    activity = lp.A @ x
    up = slack & np.isfinite(lp.row_upper)
    np.testing.assert_allclose(ours.rhs_lower[up], activity[up], rtol=1e-9, atol=1e-9)
    assert np.isinf(ours.rhs_upper[up]).all()


@pytest.mark.parametrize("name", ["afiro", "adlittle", "sc50a", "share2b", "israel"])
def test_cost_inside_its_range_keeps_the_basis(name):
    """Re-solve from the optimal basis with a basic cost moved to inside its
    range: the basis must stay optimal (zero pivots)."""
    problem = next(p for p in PROBLEMS if p.name == name)
    lp = read_mps(problem.path)
    res = solve(lp, SolveOptions(engine="builtin", ranging=True))
    rg = res.ranging
    basic = np.flatnonzero(res.basis.col_status == Status.BASIC)
    finite = basic[np.isfinite(rg.cost_lower[basic]) & np.isfinite(rg.cost_upper[basic])]
    wide = finite[(rg.cost_upper[finite] - rg.cost_lower[finite]) > 1e-3 * (1 + np.abs(lp.c[finite]))]
    assert wide.size > 0
    for j in wide[:5]:
        changed = lp.copy()
        changed.c[j] = rg.cost_lower[j] + 0.9 * (rg.cost_upper[j] - rg.cost_lower[j])
        again = reoptimize(changed, res.basis, SolveOptions(dual_tol=1e-9))
        assert again.status == "optimal"
        assert again.pivots == 0, (j, again.pivot_log)
