"""Textbook worked examples: cold (builtin and HiGHS) and warm, with shadow prices and reduced costs.

Values marked "from memory" are recalled from the books named beside them; each is also re-derived
by hand in a comment and cross-checked against a reference solve (scipy.optimize.linprog, HiGHS).
Sign conventions are those of service/lp/result.py: shadow_price = d(objective)/d(bound) and
reduced_cost = c - A' shadow_price, in the model's own sense.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import linprog

from service.lp import MAXIMIZE, MINIMIZE, LinearProgram, SolveOptions, remap, reoptimize, solve

INF = np.inf
COLD = {"builtin": SolveOptions(engine="builtin"), "highs": SolveOptions(engine="highs")}


def model(A, c, row_upper, sense, row_lower=None, names=None, rows=None) -> LinearProgram:
    A = np.asarray(A, dtype=float)
    m, n = A.shape
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=np.asarray(c, dtype=float),
        col_lower=np.zeros(n),
        col_upper=np.full(n, INF),
        row_lower=np.full(m, -INF) if row_lower is None else np.asarray(row_lower, dtype=float),
        row_upper=np.asarray(row_upper, dtype=float),
        sense=sense,
        col_names=names or [f"x{j + 1}" for j in range(n)],
        row_names=rows or [f"c{i + 1}" for i in range(m)],
    )


def reference_objective(lp: LinearProgram) -> float:
    """Reference solve: scipy.optimize.linprog(method="highs")."""
    A = lp.A.toarray()
    up = np.isfinite(lp.row_upper)
    lo = np.isfinite(lp.row_lower)
    res = linprog(
        lp.sense * lp.c,
        A_ub=np.vstack([A[up], -A[lo]]),
        b_ub=np.concatenate([lp.row_upper[up], -lp.row_lower[lo]]),
        bounds=list(zip(lp.col_lower, np.where(np.isfinite(lp.col_upper), lp.col_upper, None))),
        method="highs",
    )
    assert res.status == 0
    return float(lp.sense * res.fun)


# Hillier & Lieberman, "Introduction to Operations Research", 9th ed. (2010), Sec. 3.1 and 4.7:
# the Wyndor Glass Co. product mix. Values from memory: optimum Z = 36 at (x1, x2) = (2, 6), shadow
# prices 0, 3/2, 1. Hand check: rows 2 and 3 bind; 2x2 = 12 and 3x1 + 2x2 = 18 give (2, 6);
# y solves x1: 3 y3 = 3, x2: 2 y2 + 2 y3 = 5, so y = (0, 1.5, 1).
def wyndor() -> LinearProgram:
    return model(
        [[1, 0], [0, 2], [3, 2]],
        [3, 5],
        [4, 12, 18],
        MAXIMIZE,
        names=["doors", "windows"],
        rows=["plant1_hours", "plant2_hours", "plant3_hours"],
    )


@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_wyndor_cold(engine):
    lp = wyndor()
    res = solve(lp, COLD[engine])
    assert res.status == "optimal"
    assert res.objective == pytest.approx(36.0, rel=1e-9)  # textbook, from memory
    assert res.objective == pytest.approx(reference_objective(lp), rel=1e-9)
    assert res.x == pytest.approx([2.0, 6.0], abs=1e-9)
    assert res.shadow_price == pytest.approx([0.0, 1.5, 1.0], abs=1e-9)
    assert res.reduced_cost == pytest.approx([0.0, 0.0], abs=1e-9)  # both products are made
    assert res.row_activity == pytest.approx([2.0, 12.0, 18.0], abs=1e-9)
    assert res.check.get("passed")
    assert res.method == ("cold_builtin" if engine == "builtin" else "cold_highs")
    assert not res.warm


# Same book and section: the classical ranges for Wyndor, derived by hand (from memory they match the
# book's sensitivity discussion): the basis stays optimal for 0 <= c1 <= 7.5 (c2 = 5) and c2 >= 2
# (c1 = 3); the shadow price 1.5 of plant 2 holds for 6 <= b2 <= 18, and 1 of plant 3 for 12 <= b3 <= 24.
@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_wyndor_ranging(engine):
    opts = SolveOptions(engine=engine, ranging=True)
    res = solve(wyndor(), opts)
    assert res.status == "optimal" and res.ranging is not None
    r = res.ranging
    assert r.cost_lower == pytest.approx([0.0, 2.0], abs=1e-9)
    assert r.cost_upper[0] == pytest.approx(7.5, abs=1e-9) and r.cost_upper[1] == INF
    assert r.rhs_lower[1:] == pytest.approx([6.0, 12.0], abs=1e-9)
    assert r.rhs_upper[1:] == pytest.approx([18.0, 24.0], abs=1e-9)


# Warm re-optimization, dual simplex: a new limit x1 + x2 <= 7 cuts off (2, 6) (2 + 6 = 8). Hand check:
# new optimum (1, 6), Z = 33; binding rows plant2 and the new one, so x1: y_new = 3 and
# x2: 2 y2 + y_new = 5, y2 = 1; shadow prices (0, 1, 0, 3).
def test_wyndor_cut_reoptimizes_warm_with_dual_simplex():
    lp = wyndor()
    first = solve(lp, SolveOptions(engine="highs"))
    changed = model(
        [[1, 0], [0, 2], [3, 2], [1, 1]],
        [3, 5],
        [4, 12, 18, 7],
        MAXIMIZE,
        names=lp.col_names,
        rows=lp.row_names + ["crew_limit"],
    )
    basis, report = remap(first.basis, lp.col_names, lp.row_names, changed)
    assert report["rows_added"] == 1
    res = reoptimize(changed, basis, SolveOptions())
    assert res.status == "optimal"
    assert res.warm and res.fallback is None
    assert res.method == "dual"
    assert 1 <= res.pivots <= 3  # one violated row, a two-variable model
    assert res.objective == pytest.approx(33.0, rel=1e-9)  # derived by hand
    assert res.objective == pytest.approx(reference_objective(changed), rel=1e-9)
    assert res.x == pytest.approx([1.0, 6.0], abs=1e-9)
    assert res.shadow_price == pytest.approx([0.0, 1.0, 0.0, 3.0], abs=1e-9)
    assert res.reduced_cost == pytest.approx([0.0, 0.0], abs=1e-9)
    assert res.check.get("passed")
    assert {r["algorithm"] for r in res.pivot_log if "algorithm" in r} == {"dual"}


# Warm re-optimization, primal simplex: a new cost moves the optimum along the same polygon. With
# c = (8, 5) the ratio 8/5 is past the 7.5 / 5 limit above, so (2, 6) is no longer optimal; the next
# vertex is (4, 3) with Z = 47 (hand check: 3x1 + 2x2 = 18 and x1 = 4); rows 1 and 3 bind, so
# x2: 2 y3 = 5 and x1: y1 + 3 y3 = 8 give shadow prices (0.5, 0, 2.5).
def test_wyndor_new_price_reoptimizes_warm_with_primal_simplex():
    lp = wyndor()
    first = solve(lp, SolveOptions(engine="highs"))
    changed = lp.copy()
    changed.c = np.array([8.0, 5.0])
    res = reoptimize(changed, first.basis.copy(), SolveOptions())
    assert res.status == "optimal" and res.warm and res.fallback is None
    assert res.method == "primal"
    assert res.objective == pytest.approx(47.0, rel=1e-9)
    assert res.objective == pytest.approx(reference_objective(changed), rel=1e-9)
    assert res.x == pytest.approx([4.0, 3.0], abs=1e-9)
    assert res.shadow_price == pytest.approx([0.5, 0.0, 2.5], abs=1e-9)
    assert {r["algorithm"] for r in res.pivot_log if "algorithm" in r} == {"primal"}


# Hillier & Lieberman (same edition), Sec. 6.1: the dual of Wyndor, min 4y1 + 12y2 + 18y3 subject to
# y1 + 3y3 >= 3, 2y2 + 2y3 >= 5, y >= 0. By strong duality its optimum is 36 at y = (0, 1.5, 1) and
# its shadow prices are Wyndor's plan (2, 6). From the slack basis it is dual feasible, so the
# builtin cold start runs dual simplex.
@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_wyndor_dual_problem(engine):
    lp = model([[1, 0, 3], [0, 2, 2]], [4, 12, 18], [INF, INF], MINIMIZE, row_lower=[3, 5])
    res = solve(lp, COLD[engine])
    assert res.status == "optimal"
    assert res.objective == pytest.approx(36.0, rel=1e-9)
    assert res.x == pytest.approx([0.0, 1.5, 1.0], abs=1e-9)
    assert res.shadow_price == pytest.approx([2.0, 6.0], abs=1e-9)
    # y1 is nonbasic: its reduced cost is 4 - 1 * 2 = 2 >= 0, as a minimization needs.
    assert res.reduced_cost == pytest.approx([2.0, 0.0, 0.0], abs=1e-9)


# Chvátal, "Linear Programming", W. H. Freeman, 1983, Ch. 2 (the same example opens Ch. 2 of
# Vanderbei, "Linear Programming: Foundations and Extensions", 4th ed., 2014). From memory: optimum
# z = 13 at x = (2, 0, 1); final dictionary z = 13 - 3 x2 - x4 - x6 (x4, x6 the slacks of rows 1 and 3),
# so shadow prices (1, 0, 1) and reduced cost -3 for x2.
def chvatal() -> LinearProgram:
    return model([[2, 3, 1], [4, 1, 2], [3, 4, 2]], [5, 4, 3], [5, 11, 8], MAXIMIZE)


@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_chvatal_chapter_2(engine):
    lp = chvatal()
    res = solve(lp, COLD[engine])
    assert res.status == "optimal"
    assert res.objective == pytest.approx(13.0, rel=1e-9)  # textbook, from memory
    assert res.objective == pytest.approx(reference_objective(lp), rel=1e-9)
    assert res.x == pytest.approx([2.0, 0.0, 1.0], abs=1e-9)
    assert res.shadow_price == pytest.approx([1.0, 0.0, 1.0], abs=1e-9)
    assert res.reduced_cost == pytest.approx([0.0, -3.0, 0.0], abs=1e-9)
    if engine == "builtin":
        # The book's hand solution takes two pivots from the slack basis (Dantzig's rule); any
        # sensible pricing stays within a few.
        assert 1 <= res.pivots <= 6


# The Chvátal model plus a cut of our own, x1 + x3 <= 2 (the optimum uses 3); not from the book, so
# the new optimum is taken from the reference solve only.
def test_chvatal_warm_after_cut_matches_reference():
    lp = chvatal()
    first = solve(lp, SolveOptions(engine="builtin"))
    changed = model(
        [[2, 3, 1], [4, 1, 2], [3, 4, 2], [1, 0, 1]],
        [5, 4, 3],
        [5, 11, 8, 2],
        MAXIMIZE,
        rows=lp.row_names + ["cut"],
    )
    basis, _ = remap(first.basis, lp.col_names, lp.row_names, changed)
    res = reoptimize(changed, basis, SolveOptions())
    assert res.status == "optimal" and res.warm and res.fallback is None
    assert res.method == "dual"
    assert res.objective == pytest.approx(reference_objective(changed), rel=1e-9)
    assert res.x[0] + res.x[2] <= 2 + 1e-9


# Vanderbei, "Linear Programming: Foundations and Extensions", 4th ed., 2014, Sec. 2.6 (initialization):
# maximize -2x1 - x2 subject to -x1 + x2 <= -1, -x1 - 2x2 <= -2, x2 <= 1. The slack basis is primal
# infeasible. From memory (and by hand: rows 1 and 2 bind, x = (4/3, 1/3)): optimum -3; shadow prices
# y solve -2 = -y1 - y2, -1 = y1 - 2 y2, so y = (1, 1) in d(objective)/d(bound) terms.
@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_vanderbei_initialization_example(engine):
    lp = model([[-1, 1], [-1, -2], [0, 1]], [-2, -1], [-1, -2, 1], MAXIMIZE)
    res = solve(lp, COLD[engine])
    assert res.status == "optimal"
    assert res.objective == pytest.approx(-3.0, rel=1e-9)
    assert res.objective == pytest.approx(reference_objective(lp), rel=1e-9)
    assert res.x == pytest.approx([4 / 3, 1 / 3], abs=1e-9)
    assert res.shadow_price == pytest.approx([1.0, 1.0, 0.0], abs=1e-9)
    assert res.reduced_cost == pytest.approx([0.0, 0.0], abs=1e-9)
