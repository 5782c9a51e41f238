"""HiGHS cold solve, ranging and warm-start reference, in our conventions."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from service.lp.basis import Basis, Status, remap
from service.lp.check import verify_farkas, verify_ray
from service.lp.highs_cold import export_basis, highs_ranging, highs_warm_pivots, solve_highs
from service.lp.model import MAXIMIZE, MINIMIZE, LinearProgram
from service.lp.mps import read_mps
from service.lp.result import INFEASIBLE, ITERATION_LIMIT, OPTIMAL, TIME_LIMIT, UNBOUNDED, SolveOptions

from .netlib import netlib_problem, netlib_problems

INF = np.inf
PROBLEMS = netlib_problems()


def lp_of(c, A, row_lower, row_upper, col_lower, col_upper, sense=MINIMIZE, offset=0.0) -> LinearProgram:
    return LinearProgram(
        A=sp.csc_matrix(np.array(A, dtype=float).reshape(len(row_lower), len(c))),
        c=np.array(c, dtype=float),
        col_lower=np.array(col_lower, dtype=float),
        col_upper=np.array(col_upper, dtype=float),
        row_lower=np.array(row_lower, dtype=float),
        row_upper=np.array(row_upper, dtype=float),
        sense=sense,
        offset=offset,
    )


@pytest.mark.parametrize("prob", PROBLEMS, ids=[p.name for p in PROBLEMS])
def test_netlib_cold_solve(prob):
    lp = read_mps(prob.path)
    res = solve_highs(lp, SolveOptions())
    assert res.status == OPTIMAL
    # Netlib published optimum, shared/data/netlib/optimal.csv.
    assert res.objective == pytest.approx(prob.optimum, rel=1e-6)
    assert res.basis is not None and res.basis.basic_count() == lp.m
    assert res.check["passed"], res.check["failures"]
    assert (res.method, res.warm, res.reason) == ("cold_highs", False, "cold solve with HiGHS")
    assert res.pivots > 0 and res.timings["solve"] > 0
    assert res.x.shape == (lp.n,) and res.shadow_price.shape == (lp.m,)


# ------------------------------------------------------------------ sign conventions


def _random_lp(seed: int, sense: int) -> LinearProgram:
    """Feasible (x0 inside) and bounded (a box) random model with two-sided rows."""
    rng = np.random.default_rng(seed)
    m, n = 6, 9
    A = rng.normal(size=(m, n)) * (rng.random((m, n)) < 0.7)
    x0 = rng.uniform(0.5, 1.5, size=n)
    b = A @ x0
    row_lower = b - rng.uniform(0.2, 1.0, size=m)
    row_upper = b + rng.uniform(0.2, 1.0, size=m)
    row_upper[0] = row_lower[0] = b[0] - 0.3  # one equality row
    return lp_of(rng.normal(size=n), A, row_lower, row_upper, np.zeros(n), np.full(n, 2.0), sense, offset=4.0)


def _nondegenerate(lp: LinearProgram, res) -> bool:
    st_c, st_r = res.basis.col_status, res.basis.row_status
    x, act = res.x, res.row_activity
    for st, val, lo, up, dual in (
        (st_c, x, lp.col_lower, lp.col_upper, res.reduced_cost),
        (st_r, act, lp.row_lower, lp.row_upper, res.shadow_price),
    ):
        basic = st == Status.BASIC
        if (np.minimum(val - lo, up - val)[basic] < 1e-3).any():
            return False
        if (np.abs(dual[~basic]) < 1e-3).any():
            return False
    return True


def _objective_moved(lp: LinearProgram, kind: str, k: int, at_upper: bool, step: float) -> float:
    """Optimum after moving the active bound of row/column k by ``step`` (both sides of an equality)."""
    model = lp.copy()
    lower, upper = (model.row_lower, model.row_upper) if kind == "row" else (model.col_lower, model.col_upper)
    if lower[k] == upper[k]:
        lower[k] += step
        upper[k] += step
    elif at_upper:
        upper[k] += step
    else:
        lower[k] += step
    res = solve_highs(model, SolveOptions())
    assert res.status == OPTIMAL
    return res.objective


@pytest.mark.parametrize("sense", [MINIMIZE, MAXIMIZE], ids=["min", "max"])
def test_dual_signs_by_finite_differences(sense):
    """shadow_price = d objective / d active bound; reduced_cost the same for a column's bound (result.py)."""
    checked = 0
    for seed in range(40):
        lp = _random_lp(seed, sense)
        res = solve_highs(lp, SolveOptions())
        if res.status != OPTIMAL or not _nondegenerate(lp, res):
            continue
        y, d = res.shadow_price, res.reduced_cost
        assert np.allclose(d, lp.c - lp.A.T @ y, atol=1e-9)
        for kind, statuses, duals in (("row", res.basis.row_status, y), ("col", res.basis.col_status, d)):
            for k in np.flatnonzero(statuses != Status.BASIC):
                at_upper = statuses[k] == Status.AT_UPPER
                # Step into the feasible side so the model stays feasible.
                step = -1e-5 if at_upper else 1e-5
                slope = (_objective_moved(lp, kind, k, at_upper, step) - res.objective) / step
                assert slope == pytest.approx(duals[k], rel=1e-4, abs=1e-6), (seed, kind, k)
        # Basic rows carry no price.
        assert np.all(y[res.basis.row_status == Status.BASIC] == 0.0)
        checked += 1
        if checked == 3:
            break
    assert checked == 3, "too few nondegenerate random models to test signs on"


def test_maximization_signs_by_hand():
    # Textbook: Hillier & Lieberman, "Introduction to Operations Research",
    # Wyndor Glass (from memory): max 3x1 + 5x2, x1 <= 4, 2x2 <= 12,
    # 3x1 + 2x2 <= 18 -> x = (2, 6), z = 36, shadow prices (0, 1.5, 1).
    lp = lp_of([3, 5], [[1, 0], [0, 2], [3, 2]], [-INF] * 3, [4, 12, 18], [0, 0], [INF, INF], MAXIMIZE, 100.0)
    res = solve_highs(lp)
    assert res.status == OPTIMAL and res.objective == pytest.approx(136.0)
    assert res.x == pytest.approx([2.0, 6.0])
    assert res.shadow_price == pytest.approx([0.0, 1.5, 1.0])
    assert res.reduced_cost == pytest.approx([0.0, 0.0], abs=1e-12)
    assert res.basis.col_status.tolist() == [Status.BASIC, Status.BASIC]
    assert res.basis.row_status.tolist() == [Status.BASIC, Status.AT_UPPER, Status.AT_UPPER]


def test_basis_statuses_fixed_and_free():
    # x3 free with zero cost and no binding role stays nonbasic at 0 -> FREE;
    # x4 fixed at 2 -> FIXED; the >= row sits at its lower bound.
    lp = lp_of(
        [1, 2, 0, 1], [[1, 1, 0, 1], [1, -1, 0, 0]], [1, -INF], [INF, 3], [0, 0, -INF, 2], [INF, INF, INF, 2]
    )
    res = solve_highs(lp)
    assert res.status == OPTIMAL
    assert res.basis.col_status[2] == Status.FREE
    assert res.basis.col_status[3] == Status.FIXED
    assert res.basis.basic_count() == lp.m
    assert res.check["passed"]


# ------------------------------------------------------------------ limits, infeasible, unbounded


def test_iteration_and_time_limits():
    lp = read_mps(netlib_problem("scfxm1").path)  # about 360 simplex iterations cold
    res = solve_highs(lp, SolveOptions(max_iterations=5))
    assert res.status == ITERATION_LIMIT
    res = solve_highs(lp, SolveOptions(time_limit=1e-6))
    assert res.status == TIME_LIMIT


def test_infeasible_with_certificate():
    # x1 + x2 >= 5 and x1 + 2 x2 <= 3 with x >= 0 cannot hold together.
    lp = lp_of([1, 1], [[1, 1], [1, 2]], [5, -INF], [INF, 3], [0, 0], [INF, INF])
    res = solve_highs(lp)
    assert res.status == INFEASIBLE
    assert res.farkas is not None and res.x is None
    chk = verify_farkas(lp, res.farkas)  # independent check, check.py
    assert chk["passed"] and chk["side"] == "max<0"


def test_primal_and_dual_infeasible_resolves_to_infeasible():
    # min -x1 - x2, x1 - x2 >= 1, -x1 + x2 >= 1, x >= 0: primal infeasible (sum: 0 >= 2)
    # and dual infeasible too; HiGHS may say "infeasible or unbounded".
    lp = lp_of([-1, -1], [[1, -1], [-1, 1]], [1, 1], [INF, INF], [0, 0], [INF, INF])
    res = solve_highs(lp)
    assert res.status == INFEASIBLE
    assert res.farkas is not None and verify_farkas(lp, res.farkas)["passed"]


@pytest.mark.parametrize("sense", [MINIMIZE, MAXIMIZE], ids=["min", "max"])
def test_unbounded_with_ray(sense):
    # min -x1 - x2 (or max x1 + x2), |x1 - x2| <= 1, x >= 0: unbounded along (1, 1).
    c = [-1, -1] if sense == MINIMIZE else [1, 1]
    lp = lp_of(c, [[1, -1], [-1, 1]], [-INF, -INF], [1, 1], [0, 0], [INF, INF], sense)
    res = solve_highs(lp)
    assert res.status == UNBOUNDED
    assert res.ray is not None and verify_ray(lp, res.ray)["passed"]


def test_unbounded_empty_column_gets_a_ray():
    # A column in no row with an improving cost: presolve-level unboundedness.
    lp = lp_of([1, -1], [[1, 0]], [1], [2], [0, -3], [4, INF])
    res = solve_highs(lp)
    assert res.status == UNBOUNDED and verify_ray(lp, res.ray)["passed"]


def test_inconsistent_bounds_and_no_columns():
    lp = lp_of([1], [[1]], [0], [1], [2], [1])
    res = solve_highs(lp)
    assert res.status == INFEASIBLE and res.farkas is None and "x0" in res.message
    lp = lp_of([], np.zeros((2, 0)), [1, -INF], [2, 3], [], [])
    res = solve_highs(lp)
    assert res.status == INFEASIBLE and verify_farkas(lp, res.farkas)["passed"]
    lp = lp_of([], np.zeros((2, 0)), [-1, -INF], [2, 3], [], [], offset=7.0)
    res = solve_highs(lp)
    assert res.status == OPTIMAL and res.objective == 7.0 and res.basis.basic_count() == 2


# ------------------------------------------------------------------ ranging


def test_ranging_wyndor():
    # Textbook: Hillier & Lieberman, "Introduction to Operations Research"
    # (Wyndor Glass sensitivity analysis; from memory, re-derived by hand):
    # c1 in [0, 7.5], c2 in [2, inf); b2 in [6, 18], b3 in [12, 24].
    lp = lp_of([3, 5], [[1, 0], [0, 2], [3, 2]], [-INF] * 3, [4, 12, 18], [0, 0], [INF, INF], MAXIMIZE)
    rng = highs_ranging(lp)
    assert rng.cost_lower == pytest.approx([0.0, 2.0])
    assert rng.cost_upper.tolist() == [pytest.approx(7.5), INF]
    assert rng.rhs_lower[1:] == pytest.approx([6.0, 12.0])
    assert rng.rhs_upper[1:] == pytest.approx([18.0, 24.0])
    # Row 1 is basic (activity 2, bound 4): HiGHS gives the interval its
    # ACTIVITY can be pinned to, [0, 4] (x1 = 0 -> z = 30; x1 = 4 -> z = 27).
    assert rng.rhs_lower[0] == pytest.approx(0.0) and rng.rhs_upper[0] == pytest.approx(4.0)
    # The ranging option attaches the same record to a solve.
    res = solve_highs(lp, SolveOptions(ranging=True))
    assert np.array_equal(res.ranging.cost_upper, rng.cost_upper)


def test_ranging_meaning_by_resolving():
    # Worked by hand: min 2x1 + 3x2, x1 + x2 >= 4, x1 + 3x2 >= 6, x >= 0 ->
    # x = (3, 1), y = (1.5, 0.5). Cost ranges c1 in [1, 3], c2 in [2, 6];
    # rhs ranges b1 in [2, 6], b2 in [4, 12].
    lp = lp_of([2, 3], [[1, 1], [1, 3]], [4, 6], [INF, INF], [0, 0], [INF, INF])
    rng = highs_ranging(lp)
    assert rng.cost_lower == pytest.approx([1.0, 2.0]) and rng.cost_upper == pytest.approx([3.0, 6.0])
    assert rng.rhs_lower == pytest.approx([2.0, 4.0]) and rng.rhs_upper == pytest.approx([6.0, 12.0])
    base = solve_highs(lp)
    for j in range(lp.n):
        for value, same in (
            (rng.cost_lower[j] + 0.01, True),
            (rng.cost_upper[j] - 0.01, True),
            (rng.cost_lower[j] - 0.5, False),
            (rng.cost_upper[j] + 0.5, False),
        ):
            changed = lp.copy()
            changed.c[j] = value
            x = solve_highs(changed).x
            assert np.allclose(x, base.x, atol=1e-9) == same, (j, value)
    for i in range(lp.m):
        for value, inside in (
            (rng.rhs_lower[i] + 0.01, True),
            (rng.rhs_upper[i] - 0.01, True),
            (rng.rhs_lower[i] - 0.5, False),
            (rng.rhs_upper[i] + 0.5, False),
        ):
            changed = lp.copy()
            changed.row_lower[i] = value
            predicted = base.objective + base.shadow_price[i] * (value - lp.row_lower[i])
            assert (abs(solve_highs(changed).objective - predicted) < 1e-9) == inside, (i, value)


# ------------------------------------------------------------------ warm-start reference


def _cut_through_optimum(lp: LinearProgram, x: np.ndarray, basis: Basis) -> LinearProgram:
    """Add row sum_j sign(x_j) x_j <= 0.99 * that value over the nonzero basic columns: it cuts x."""
    basic = np.flatnonzero((basis.col_status == Status.BASIC) & (np.abs(x) > 1e-7))
    a = np.zeros(lp.n)
    a[basic] = np.sign(x[basic])
    value = float(a @ x)
    return LinearProgram(
        A=sp.vstack([lp.A, sp.csr_matrix(a)]).tocsc(),
        c=lp.c,
        col_lower=lp.col_lower,
        col_upper=lp.col_upper,
        row_lower=np.append(lp.row_lower, -INF),
        row_upper=np.append(lp.row_upper, value - 0.01 * max(1.0, abs(value))),
        sense=lp.sense,
        offset=lp.offset,
        col_names=lp.col_names,
        row_names=lp.row_names + ["cut_through_optimum"],
    )


@pytest.mark.parametrize("name", ["sc50a", "share2b", "bandm", "scfxm1", "capri"])
def test_highs_warm_pivots_after_a_cut(name):
    lp = read_mps(netlib_problem(name).path)
    first = solve_highs(lp)
    cut_lp = _cut_through_optimum(lp, first.x, first.basis)
    assert cut_lp.A[-1] @ first.x > cut_lp.row_upper[-1]  # the old optimum is cut off
    basis, report = remap(first.basis, lp.col_names, lp.row_names, cut_lp)
    assert report["rows_added"] == 1 and basis.basic_count() == cut_lp.m
    cold = solve_highs(cut_lp)  # reference: cold HiGHS solve of the changed model
    assert cold.status == OPTIMAL
    iterations, objective = highs_warm_pivots(cut_lp, basis)
    assert objective == pytest.approx(cold.objective, rel=1e-9)
    assert 1 <= iterations <= 50 and iterations < cold.pivots


def test_highs_warm_pivots_from_optimal_basis_is_zero():
    lp = read_mps(netlib_problem("afiro").path)
    res = solve_highs(lp)
    iterations, objective = highs_warm_pivots(lp, res.basis)
    assert iterations == 0 and objective == pytest.approx(res.objective, rel=1e-12)
    with pytest.raises(ValueError):
        highs_warm_pivots(lp, Basis(res.basis.col_status[:-1], res.basis.row_status))


def test_export_basis_round_trip():
    basis = Basis([Status.BASIC, Status.AT_LOWER, Status.AT_UPPER, Status.FIXED, Status.FREE], [Status.BASIC])
    hb = export_basis(basis)
    assert [s.name for s in hb.col_status] == ["kBasic", "kLower", "kUpper", "kLower", "kZero"]
    assert hb.valid
