"""The independent check on small models worked by hand, and solutions that must FAIL it."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from service.lp.basis import Basis, Status
from service.lp.check import verify, verify_farkas, verify_ray
from service.lp.model import MAXIMIZE, MINIMIZE, LinearProgram

INF = np.inf
B, L, U, X = Status.BASIC, Status.AT_LOWER, Status.AT_UPPER, Status.FIXED


def lp_of(c, A, row_lower, row_upper, col_lower, col_upper, sense=MINIMIZE, offset=0.0) -> LinearProgram:
    return LinearProgram(
        A=sp.csc_matrix(np.array(A, dtype=float)),
        c=np.array(c, dtype=float),
        col_lower=np.array(col_lower, dtype=float),
        col_upper=np.array(col_upper, dtype=float),
        row_lower=np.array(row_lower, dtype=float),
        row_upper=np.array(row_upper, dtype=float),
        sense=sense,
        offset=offset,
    )


# Textbook: Hillier & Lieberman, "Introduction to Operations Research" (the
# Wyndor Glass example); values from memory and re-derived by hand:
#   max 3 x1 + 5 x2  s.t.  x1 <= 4,  2 x2 <= 12,  3 x1 + 2 x2 <= 18,  x >= 0
#   optimum x = (2, 6), z = 36, shadow prices (0, 1.5, 1), reduced costs (0, 0).
def wyndor(offset: float = 0.0) -> LinearProgram:
    return lp_of(
        [3, 5], [[1, 0], [0, 2], [3, 2]], [-INF] * 3, [4, 12, 18], [0, 0], [INF, INF], MAXIMIZE, offset
    )


WYNDOR_X = np.array([2.0, 6.0])
WYNDOR_Y = np.array([0.0, 1.5, 1.0])
WYNDOR_D = np.array([0.0, 0.0])
WYNDOR_BASIS = Basis([B, B], [B, U, U])


# Worked by hand: min 2 x1 + 3 x2  s.t.  x1 + x2 >= 4,  x1 + 3 x2 >= 6,  x >= 0.
# Vertices (0,4): 12, (3,1): 9, (6,0): 12 -> optimum (3,1), z = 9.
# Duals from y1 + y2 = 2, y1 + 3 y2 = 3: y = (1.5, 0.5) (>= 0 on >= rows in a
# minimization), dual objective 4*1.5 + 6*0.5 = 9.
def diet() -> LinearProgram:
    return lp_of([2, 3], [[1, 1], [1, 3]], [4, 6], [INF, INF], [0, 0], [INF, INF])


DIET_X = np.array([3.0, 1.0])
DIET_Y = np.array([1.5, 0.5])


def test_wyndor_optimum_passes():
    lp = wyndor()
    out = verify(lp, WYNDOR_X, lp.A @ WYNDOR_X, WYNDOR_Y, WYNDOR_D, basis=WYNDOR_BASIS, objective=36.0)
    assert out["passed"], out["failures"]
    assert out["objective"] == 36.0
    assert out["dual_objective"] == pytest.approx(36.0)
    assert out["gap"] == pytest.approx(0.0, abs=1e-12)
    assert out["basic_count"] == 3


def test_diet_optimum_passes_with_offset():
    lp = diet()
    lp.offset = 10.0
    out = verify(lp, DIET_X, lp.A @ DIET_X, DIET_Y, lp.c - lp.A.T @ DIET_Y, basis=Basis([B, B], [L, L]))
    assert out["passed"], out["failures"]
    assert out["objective"] == 19.0 and out["dual_objective"] == pytest.approx(19.0)


def test_infeasible_point_fails():
    lp = wyndor()
    x = np.array([2.1, 6.0])  # 3*2.1 + 12 = 18.3 > 18
    out = verify(lp, x, lp.A @ x, WYNDOR_Y, lp.c - lp.A.T @ WYNDOR_Y)
    assert not out["passed"]
    assert out["max_row_violation"] == pytest.approx(0.3)
    assert out["max_row_violation_rel"] == pytest.approx(0.3 / 18)
    assert out["worst_row"] == 2
    x = np.array([-0.5, 6.0])
    out = verify(lp, x, lp.A @ x, None, None)
    assert not out["passed"] and out["max_bound_violation"] == pytest.approx(0.5)


def test_misreported_activity_and_objective_fail():
    lp = wyndor()
    activity = lp.A @ WYNDOR_X
    activity[1] += 1e-3
    out = verify(lp, WYNDOR_X, activity, WYNDOR_Y, WYNDOR_D)
    assert not out["passed"] and "reported row activity differs from A @ x" in out["failures"]
    out = verify(lp, WYNDOR_X, lp.A @ WYNDOR_X, WYNDOR_Y, WYNDOR_D, objective=36.01)
    assert not out["passed"] and out["objective_error_rel"] == pytest.approx(0.01 / 36)


def test_flipped_shadow_prices_fail():
    # The minimization sign convention applied to a maximization: every sign wrong.
    lp = wyndor()
    y = -WYNDOR_Y
    out = verify(lp, WYNDOR_X, lp.A @ WYNDOR_X, y, lp.c - lp.A.T @ y)
    assert not out["passed"]
    assert out["max_dual_sign_violation_rel"] > 1e-3


def test_reported_reduced_costs_must_match():
    lp = wyndor()
    out = verify(lp, WYNDOR_X, lp.A @ WYNDOR_X, WYNDOR_Y, np.array([0.0, 0.1]))
    assert not out["passed"]
    assert out["max_reduced_cost_error_rel"] == pytest.approx(0.1 / 5)


def test_suboptimal_vertex_fails():
    # (4, 3) is a feasible vertex of Wyndor with z = 27; its basis duals
    # (rows 1 and 3 binding: y1 + 3 y3 = 3, 2 y3 = 5 -> y3 = 2.5, y1 = -4.5)
    # have a negative price on a <= row of a maximization.
    lp = wyndor()
    x = np.array([4.0, 3.0])
    y = np.array([-4.5, 0.0, 2.5])
    out = verify(lp, x, lp.A @ x, y, lp.c - lp.A.T @ y)
    assert out["max_row_violation"] == 0.0 and out["max_bound_violation"] == 0.0
    assert out["max_reduced_cost_error_rel"] == 0.0
    assert not out["passed"]
    assert out["worst_dual_row"] == 0
    # The origin with zero duals: reduced costs 3 and 5 at lower bounds of a maximization.
    x = np.zeros(2)
    out = verify(lp, x, lp.A @ x, np.zeros(3), lp.c.copy())
    assert not out["passed"] and out["worst_dual_column"] == 1
    assert out["gap"] == pytest.approx(0.0)  # the gap alone cannot see this one; the sign check does


def test_interior_point_with_nonzero_reduced_cost_fails():
    lp = diet()
    x = np.array([3.5, 1.5])  # feasible, strictly inside the bounds, rows slack
    out = verify(lp, x, lp.A @ x, DIET_Y, lp.c - lp.A.T @ DIET_Y)
    assert not out["passed"]
    assert out["max_complementarity"] > 0
    assert out["gap_rel"] > 1e-3


def test_fixed_and_free_columns():
    # min x1 - x2 + 0 x3, x1 + x2 + x3 = 5 (free duals), x1 fixed at 1, x2 <= 3, x3 free.
    # Optimum: x2 = 3 (at upper), x1 = 1, x3 = 1 (basic, free): y = 0 from x3's
    # reduced cost; d = (1, -1, 0): x1 fixed (any sign), x2 at upper with d < 0.
    lp = lp_of([1, -1, 0], [[1, 1, 1]], [5], [5], [1, 0, -INF], [1, 3, INF])
    x = np.array([1.0, 3.0, 1.0])
    y = np.zeros(1)
    basis = Basis([X, U, B], [X])
    out = verify(lp, x, lp.A @ x, y, lp.c - lp.A.T @ y, basis=basis)
    assert out["passed"], out["failures"]
    # x2 moved off its upper bound while its reduced cost is nonzero: must fail.
    x = np.array([1.0, 2.0, 2.0])
    out = verify(lp, x, lp.A @ x, y, lp.c - lp.A.T @ y)
    assert not out["passed"]


def test_basis_faults_fail():
    lp = wyndor()
    args = (lp, WYNDOR_X, lp.A @ WYNDOR_X, WYNDOR_Y, WYNDOR_D)
    out = verify(*args, basis=Basis([B, B], [B, B, U]))  # m + 1 basics
    assert not out["passed"] and out["basic_count"] == 4
    out = verify(*args, basis=Basis([B, L], [B, B, U]))  # x2 = 6 called at_lower
    assert not out["passed"] and out["nonbasic_off_bound"] == 1


def test_tolerance_scales_with_bounds():
    # A violation of 1e-4 on a bound of 1e3 is 1e-7 relative: passes at tol 1e-6; on a bound of 1 it fails.
    big = lp_of([1], [[1]], [-INF], [1000], [0], [INF])
    x = np.array([1000.0001])
    assert verify(big, x, None, None, None)["passed"]
    small = lp_of([1], [[1]], [-INF], [1], [0], [INF])
    assert not verify(small, np.array([1.0001]), None, None, None)["passed"]


# ------------------------------------------------------------------ Farkas


def test_farkas_two_contradicting_rows():
    # x1 + x2 <= 2 and x1 + x2 >= 3 with x >= 0. y = (-1, 1): z = 0 and
    # max over the row box of -y @ r = r1 - r2 <= 2 - 3 = -1 < 0.
    lp = lp_of([1, 1], [[1, 1], [1, 1]], [-INF, 3], [2, INF], [0, 0], [INF, INF])
    out = verify_farkas(lp, np.array([-1.0, 1.0]))
    assert out["passed"] and out["side"] == "max<0" and out["margin"] == pytest.approx(1.0)
    # The opposite sign proves it from the other side.
    out = verify_farkas(lp, np.array([1.0, -1.0]))
    assert out["passed"] and out["side"] == "min>0"
    # Scale does not matter.
    assert verify_farkas(lp, np.array([-250.0, 250.0]))["passed"]


def test_farkas_with_column_bounds():
    # x1 <= 1 (bound) but row x1 + 0 x2 >= 2; y = (1): z = (1, 0),
    # max z @ x = 1, max -y r over r >= 2 is -2, total -1 < 0.
    lp = lp_of([0, 0], [[1, 0]], [2], [INF], [0, 0], [1, INF])
    out = verify_farkas(lp, np.array([1.0]))
    assert out["passed"] and out["margin"] == pytest.approx(1.0)


def test_farkas_bad_multipliers_fail():
    lp = lp_of([1, 1], [[1, 1], [1, 1]], [-INF, 3], [2, INF], [0, 0], [INF, INF])
    out = verify_farkas(lp, np.array([1.0, 1.0]))  # z = (2, 2) meets x <= +inf
    assert not out["passed"] and out["infinite_terms"] > 0
    assert not verify_farkas(lp, np.zeros(2))["passed"]
    # y = (-1, 0.9) is a valid certificate (z = -0.1 (1, 1), max = 2 - 2.7 < 0) ...
    assert verify_farkas(lp, np.array([-1.0, 0.9]))["passed"]
    # ... y = (-1, 0.5) is not: max over the box is 2 - 1.5 = 0.5 > 0, and the min side meets x <= +inf.
    out = verify_farkas(lp, np.array([-1.0, 0.5]))
    assert not out["passed"]
    assert not verify_farkas(lp, np.array([np.nan, 1.0]))["passed"]


def test_farkas_cannot_pass_on_a_feasible_model():
    # Soundness: no multiplier vector may "prove" a feasible model infeasible.
    lp = wyndor()
    rng = np.random.default_rng(7)
    for _ in range(500):
        y = rng.normal(size=3) * rng.integers(0, 2, size=3)
        assert not verify_farkas(lp, y)["passed"]
    lp = diet()
    for _ in range(500):
        assert not verify_farkas(lp, rng.normal(size=2))["passed"]


# ------------------------------------------------------------------ rays


def test_ray_of_an_unbounded_model():
    # min -x1 - x2, x1 - x2 <= 1, -x1 + x2 <= 1, x >= 0: along (1, 1) rows stay at 0, cost falls by 2.
    lp = lp_of([-1, -1], [[1, -1], [-1, 1]], [-INF, -INF], [1, 1], [0, 0], [INF, INF])
    out = verify_ray(lp, np.array([1.0, 1.0]))
    assert out["passed"] and out["improvement"] == pytest.approx(2.0)
    assert verify_ray(lp, np.array([3.0, 3.0]))["passed"]
    # Same model as a maximization of x1 + x2.
    lp_max = lp_of([1, 1], [[1, -1], [-1, 1]], [-INF, -INF], [1, 1], [0, 0], [INF, INF], MAXIMIZE)
    assert verify_ray(lp_max, np.array([1.0, 1.0]))["passed"]


def test_bad_rays_fail():
    lp = lp_of([-1, -1], [[1, -1], [-1, 1]], [-INF, -INF], [1, 1], [0, 0], [INF, INF])
    out = verify_ray(lp, np.array([1.0, 0.0]))  # row 1 grows without limit
    assert not out["passed"] and out["worst_row"] == 0
    out = verify_ray(lp, np.array([-1.0, -1.0]))  # leaves x >= 0 and worsens the cost
    assert not out["passed"] and out["max_bound_violation"] == pytest.approx(1.0)
    assert out["improvement"] < 0
    flat = lp_of([1, -1], [[1, -1]], [-INF], [1], [0, 0], [INF, INF])
    assert not verify_ray(flat, np.array([1.0, 1.0]))["passed"]  # cost does not improve
    assert not verify_ray(lp, np.zeros(2))["passed"]
    # The maximization reading of a minimization ray fails.
    lp_max = lp_of([-1, -1], [[1, -1], [-1, 1]], [-INF, -INF], [1, 1], [0, 0], [INF, INF], MAXIMIZE)
    assert not verify_ray(lp_max, np.array([1.0, 1.0]))["passed"]
