"""Independent check of a solution against the ORIGINAL model data.

Nothing here reads solver state: every figure is recomputed from the
unscaled LinearProgram and the vectors handed in, so a bug in scaling, in a
factorization or in sign handling shows up here rather than in a plan.

Sign conventions are those of result.py (user's objective sense):
shadow_price[i] = d objective / d active bound of row i and
reduced_cost[j] = c[j] - A[:, j] @ shadow_price. With s = +1 for
minimization and -1 for maximization, s * reduced_cost[j] > 0 is allowed only
when column j sits at its lower bound, < 0 only at its upper bound; the same
holds for s * shadow_price[i] and row i's activity (a row behaves like its
logical variable, whose reduced cost is the shadow price).

Tolerance scaling (common practice, not a theorem): primal figures are
measured relative to max(1, |bound|) of the bound in question; dual figures
relative to max(1, ||c||_inf); objective figures relative to
max(1, |objective|). A figure passes when it is <= tol.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .basis import Basis, Status
from .model import LinearProgram


def _max(arr: np.ndarray) -> float:
    return float(np.max(arr)) if arr.size else 0.0


def _argmax(arr: np.ndarray) -> int | None:
    return int(np.argmax(arr)) if arr.size and float(np.max(arr)) > 0 else None


def _abs_max(lp: LinearProgram, axis: int) -> np.ndarray:
    """Largest |a_ij| per column (axis=0) or per row (axis=1); zeros for empty ones."""
    size = lp.n if axis == 0 else lp.m
    if lp.A.nnz == 0 or size == 0:
        return np.zeros(size)
    return np.asarray(abs(lp.A).max(axis=axis).todense()).reshape(-1)


def _violations(values: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Absolute violation of lower <= values <= upper and the same relative to max(1, |bound|)."""
    with np.errstate(invalid="ignore"):
        below = np.where(np.isfinite(lower), lower - values, 0.0)
        above = np.where(np.isfinite(upper), values - upper, 0.0)
    below = np.maximum(below, 0.0)
    above = np.maximum(above, 0.0)
    absolute = np.maximum(below, above)
    scale = np.where(
        below >= above,
        np.maximum(1.0, np.abs(np.where(np.isfinite(lower), lower, 0.0))),
        np.maximum(1.0, np.abs(np.where(np.isfinite(upper), upper, 0.0))),
    )
    return absolute, absolute / scale


def _sides(
    values: np.ndarray, lower: np.ndarray, upper: np.ndarray, tol: float
) -> tuple[np.ndarray, np.ndarray]:
    """Which entries sit at their lower / upper bound (within tol * max(1, |bound|))."""
    with np.errstate(invalid="ignore"):
        at_lower = np.isfinite(lower) & (np.abs(values - lower) <= tol * np.maximum(1.0, np.abs(lower)))
        at_upper = np.isfinite(upper) & (np.abs(values - upper) <= tol * np.maximum(1.0, np.abs(upper)))
    return at_lower, at_upper


def _dual_sign_violation(
    duals_min: np.ndarray, at_lower: np.ndarray, at_upper: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> np.ndarray:
    """How far a (min-sense) reduced cost is from what its position allows.

    At lower only: must be >= 0. At upper only: <= 0. At both (fixed, or an
    equality row): any sign. Strictly between, or a free entry: must be 0.
    """
    fixed = at_lower & at_upper
    only_lower = at_lower & ~at_upper
    only_upper = at_upper & ~at_lower
    between = ~at_lower & ~at_upper
    viol = np.zeros_like(duals_min)
    viol[only_lower] = np.maximum(-duals_min[only_lower], 0.0)
    viol[only_upper] = np.maximum(duals_min[only_upper], 0.0)
    viol[between] = np.abs(duals_min[between])
    viol[fixed] = 0.0
    # Equal bounds count as fixed even when the value is off the bound (that
    # is a primal violation, reported separately).
    viol[lower == upper] = 0.0
    return viol


def _dual_bound_terms(
    duals_min: np.ndarray, values: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> np.ndarray:
    """The bound each dual value prices: lower for positive, upper for negative (min sense).

    When that bound is infinite the dual is infeasible there (reported as a
    sign violation); the primal value stands in so the gap stays finite and
    equals the sum of complementarity products.
    """
    chosen = np.where(duals_min > 0, lower, np.where(duals_min < 0, upper, values))
    return np.where(np.isfinite(chosen), chosen, values)


def verify(
    lp: LinearProgram,
    x: np.ndarray,
    row_activity: np.ndarray | None,
    shadow_price: np.ndarray | None,
    reduced_cost: np.ndarray | None,
    basis: Basis | None = None,
    tol: float = 1e-6,
    objective: float | None = None,
) -> dict[str, Any]:
    """Check primal feasibility, dual feasibility and optimality from the model data.

    Returns a dict of figures (max absolute and relative violations, with the
    worst index) and ``passed``. Dual figures are None when no duals are
    given; then ``passed`` covers the primal side only. ``objective``, when
    given, is compared with c @ x + offset.
    """
    x = np.asarray(x, dtype=np.float64).reshape(-1)
    if x.shape != (lp.n,):
        raise ValueError(f"x has shape {x.shape}, expected ({lp.n},)")
    sense = float(lp.sense)
    c_scale = max(1.0, float(np.max(np.abs(lp.c), initial=0.0)))
    activity = lp.A @ x
    fig: dict[str, Any] = {"tol": tol}
    failures: list[str] = []

    finite = bool(np.isfinite(x).all())
    fig["finite"] = finite
    if not finite:
        failures.append("x holds NaN or inf")

    row_abs, row_rel = _violations(activity, lp.row_lower, lp.row_upper)
    col_abs, col_rel = _violations(x, lp.col_lower, lp.col_upper)
    fig["max_row_violation"] = _max(row_abs)
    fig["max_row_violation_rel"] = _max(row_rel)
    fig["worst_row"] = _argmax(row_rel)
    fig["max_bound_violation"] = _max(col_abs)
    fig["max_bound_violation_rel"] = _max(col_rel)
    fig["worst_column"] = _argmax(col_rel)
    if fig["max_row_violation_rel"] > tol:
        failures.append("row violation")
    if fig["max_bound_violation_rel"] > tol:
        failures.append("bound violation")

    if row_activity is not None:
        reported = np.asarray(row_activity, dtype=np.float64).reshape(-1)
        if reported.shape != (lp.m,):
            raise ValueError(f"row_activity has shape {reported.shape}, expected ({lp.m},)")
        err = np.abs(reported - activity) / np.maximum(1.0, np.abs(activity))
        fig["max_activity_error_rel"] = _max(err)
        if not (fig["max_activity_error_rel"] <= tol):
            failures.append("reported row activity differs from A @ x")
    else:
        fig["max_activity_error_rel"] = None

    primal_obj = float(lp.c @ x + lp.offset)
    fig["objective"] = primal_obj
    obj_scale = max(1.0, abs(primal_obj))
    if objective is not None:
        fig["objective_error_rel"] = abs(float(objective) - primal_obj) / obj_scale
        if not (fig["objective_error_rel"] <= tol):
            failures.append("reported objective differs from c @ x + offset")

    col_at_lower, col_at_upper = _sides(x, lp.col_lower, lp.col_upper, tol)
    row_at_lower, row_at_upper = _sides(activity, lp.row_lower, lp.row_upper, tol)

    dual_keys = (
        "max_reduced_cost_error_rel",
        "max_dual_sign_violation_rel",
        "worst_dual_column",
        "worst_dual_row",
        "max_complementarity",
        "dual_objective",
        "gap",
        "gap_rel",
    )
    if shadow_price is None or reduced_cost is None:
        fig.update(dict.fromkeys(dual_keys))
    else:
        y = np.asarray(shadow_price, dtype=np.float64).reshape(-1)
        d_rep = np.asarray(reduced_cost, dtype=np.float64).reshape(-1)
        if y.shape != (lp.m,) or d_rep.shape != (lp.n,):
            raise ValueError("shadow_price / reduced_cost have the wrong length")
        if not (np.isfinite(y).all() and np.isfinite(d_rep).all()):
            failures.append("duals hold NaN or inf")
        d = lp.c - lp.A.T @ y
        fig["max_reduced_cost_error_rel"] = _max(np.abs(d - d_rep)) / c_scale
        if not (fig["max_reduced_cost_error_rel"] <= tol):
            failures.append("reported reduced costs differ from c - A^T y")
        # Sign rules in minimization terms; the recomputed d is used so the
        # check stands on the model data, not on what was reported.
        d_min, y_min = sense * d, sense * y
        col_sign = (
            _dual_sign_violation(d_min, col_at_lower, col_at_upper, lp.col_lower, lp.col_upper) / c_scale
        )
        row_sign = (
            _dual_sign_violation(y_min, row_at_lower, row_at_upper, lp.row_lower, lp.row_upper) / c_scale
        )
        fig["max_dual_sign_violation_rel"] = max(_max(col_sign), _max(row_sign))
        fig["worst_dual_column"] = _argmax(col_sign)
        fig["worst_dual_row"] = _argmax(row_sign)
        if not (fig["max_dual_sign_violation_rel"] <= tol):
            failures.append("reduced cost or shadow price of the wrong sign for its position")

        col_ref = _dual_bound_terms(d_min, x, lp.col_lower, lp.col_upper)
        row_ref = _dual_bound_terms(y_min, activity, lp.row_lower, lp.row_upper)
        # Complementary slackness: dual value times distance to the bound it prices.
        comp = np.concatenate([np.abs(d * (x - col_ref)), np.abs(y * (activity - row_ref))])
        fig["max_complementarity"] = _max(comp)
        dual_obj = float(y @ row_ref + d @ col_ref + lp.offset)
        fig["dual_objective"] = dual_obj
        fig["gap"] = primal_obj - dual_obj
        fig["gap_rel"] = abs(fig["gap"]) / obj_scale
        if not (fig["gap_rel"] <= tol):
            failures.append("primal-dual objective gap")

    if basis is not None:
        sides = ((col_at_lower, col_at_upper), (row_at_lower, row_at_upper))
        fig.update(_basis_figures(lp, basis, x, activity, tol, sides))
        if fig["basic_count"] != lp.m:
            failures.append(f"basis has {fig['basic_count']} basics, expected {lp.m}")
        if fig["nonbasic_off_bound"]:
            failures.append("nonbasic variable not at the bound its status names")

    fig["failures"] = failures
    fig["passed"] = not failures
    return fig


def _basis_figures(
    lp: LinearProgram, basis: Basis, x: np.ndarray, activity: np.ndarray, tol: float, sides=None
) -> dict:
    """``sides``: the (at_lower, at_upper) pairs of the columns and the rows, when already known."""
    if basis.n != lp.n or basis.m != lp.m:
        raise ValueError(f"basis is {basis.n} x {basis.m}, model is {lp.n} x {lp.m}")
    if sides is None:
        sides = (_sides(x, lp.col_lower, lp.col_upper, tol), _sides(activity, lp.row_lower, lp.row_upper, tol))
    off = 0
    for status, values, (at_lower, at_upper) in (
        (basis.col_status, x, sides[0]),
        (basis.row_status, activity, sides[1]),
    ):
        off += int(((status == Status.AT_LOWER) & ~at_lower).sum())
        off += int(((status == Status.AT_UPPER) & ~at_upper).sum())
        off += int(((status == Status.FIXED) & ~(at_lower | at_upper)).sum())
        off += int(((status == Status.FREE) & (np.abs(values) > tol)).sum())
    return {"basic_count": basis.basic_count(), "nonbasic_off_bound": off}


def verify_farkas(lp: LinearProgram, y: np.ndarray, tol: float = 1e-6) -> dict[str, Any]:
    """Check that row multipliers y prove the model infeasible.

    For any feasible x with row activity r = A x, z @ x - y @ r = 0 where
    z = A^T y. If the maximum of z @ x - y @ r over the box of column bounds
    and row bounds is < 0 (or the minimum > 0), no feasible x exists. y is
    first scaled to ||y||_inf = 1 (a certificate is scale-free). Entries of z
    below tol * max(1, ||A_j||_inf) count as zero (rounding noise; common
    practice); any other entry meeting an infinite bound makes that side
    unbounded and the certificate fails on that side. ``margin`` is how far
    the better side is beyond 0; it must exceed tol * max(1, largest term).
    """
    y = np.asarray(y, dtype=np.float64).reshape(-1)
    if y.shape != (lp.m,):
        raise ValueError(f"y has shape {y.shape}, expected ({lp.m},)")
    out: dict[str, Any] = {"tol": tol, "passed": False, "margin": None, "side": None}
    if not np.isfinite(y).all():
        out["reason"] = "y holds NaN or inf"
        return out
    norm = float(np.max(np.abs(y), initial=0.0))
    if norm == 0.0:
        out["reason"] = "y is zero"
        return out
    y = y / norm
    z = lp.A.T @ y
    col_scale = np.maximum(1.0, _abs_max(lp, axis=0))
    # A small entry counts as rounding noise (zero) when its column has both
    # bounds finite, or when it is tiny even for noise; a small but real entry
    # on a column that can run to infinity must be judged, or a feasible model
    # whose only repair is a huge move would pass as proven infeasible.
    small = np.abs(z) <= tol * col_scale
    open_col = ~(np.isfinite(lp.col_lower) & np.isfinite(lp.col_upper))
    z[small & (~open_col | (np.abs(z) <= 1e-12 * col_scale))] = 0.0

    def extreme(sign: float) -> tuple[float, float, int]:
        """sign=+1: max of z@x - y@r over the box; sign=-1: min. Returns (value, largest term, infinite terms)."""
        # max of a*v over [lo, up] is a*up for a > 0, a*lo for a < 0.
        terms = []
        infinite = 0
        for coef, lower, upper in (
            (sign * z, lp.col_lower, lp.col_upper),
            (-sign * y, lp.row_lower, lp.row_upper),
        ):
            pos, neg = coef > 0, coef < 0
            need_up, need_lo = pos & ~np.isfinite(upper), neg & ~np.isfinite(lower)
            infinite += int(need_up.sum() + need_lo.sum())
            t = np.zeros_like(coef)
            t[pos & np.isfinite(upper)] = coef[pos & np.isfinite(upper)] * upper[pos & np.isfinite(upper)]
            t[neg & np.isfinite(lower)] = coef[neg & np.isfinite(lower)] * lower[neg & np.isfinite(lower)]
            terms.append(t)
        allt = np.concatenate(terms)
        return float(allt.sum()), float(np.max(np.abs(allt), initial=0.0)), infinite

    best: dict[str, Any] | None = None
    best_key = -np.inf
    for sign, side in ((1.0, "max<0"), (-1.0, "min>0")):
        value, largest, infinite = extreme(sign)
        threshold = tol * max(1.0, largest)
        # value is the maximum of sign * (z@x - y@r); a proof needs it < 0.
        # An infinite side has no margin (None keeps the figures JSON-safe).
        margin = -value if infinite == 0 else None
        key = (margin - threshold) if margin is not None else -np.inf
        if best is None or key > best_key:
            best = {"side": side, "margin": margin, "threshold": threshold, "infinite_terms": infinite}
            best_key = key
    out.update(best)
    out["passed"] = bool(best["margin"] is not None and best["margin"] > best["threshold"])
    if not out["passed"]:
        out["reason"] = (
            "an infinite bound meets a nonzero multiplier"
            if best["infinite_terms"]
            else "the bound combination does not exceed zero by the margin"
        )
    return out


def verify_ray(lp: LinearProgram, ray: np.ndarray, tol: float = 1e-6) -> dict[str, Any]:
    """Check that a column direction proves unboundedness (given a feasible point).

    The direction is scaled to ||ray||_inf = 1. Each row with a finite upper
    bound needs (A ray)_i <= tol * max(1, ||A_i||_inf), finite lower
    (A ray)_i >= -that; each column with a finite upper bound needs
    ray_j <= tol, finite lower ray_j >= -tol; and the objective must improve:
    -s * c @ ray > tol * ||c||_inf (s = +1 min, -1 max). Feasibility of some
    point is a separate matter (a ray alone does not prove unboundedness of
    an infeasible model).
    """
    d = np.asarray(ray, dtype=np.float64).reshape(-1)
    if d.shape != (lp.n,):
        raise ValueError(f"ray has shape {d.shape}, expected ({lp.n},)")
    out: dict[str, Any] = {"tol": tol, "passed": False}
    norm = float(np.max(np.abs(d), initial=0.0))
    if not np.isfinite(d).all() or norm == 0.0:
        out["reason"] = "ray is zero or not finite"
        return out
    d = d / norm
    Ad = lp.A @ d
    row_scale = np.maximum(1.0, _abs_max(lp, axis=1))
    row_viol = np.maximum(
        np.where(np.isfinite(lp.row_upper), Ad, -np.inf),
        np.where(np.isfinite(lp.row_lower), -Ad, -np.inf),
    )
    row_viol = np.maximum(row_viol, 0.0) / row_scale
    col_viol = np.maximum(
        np.where(np.isfinite(lp.col_upper), d, -np.inf),
        np.where(np.isfinite(lp.col_lower), -d, -np.inf),
    )
    col_viol = np.maximum(col_viol, 0.0)
    c_norm = float(np.max(np.abs(lp.c), initial=0.0))
    improvement = -float(lp.sense) * float(lp.c @ d)  # > 0 means the objective gets better
    out["max_row_violation"] = _max(row_viol)
    out["worst_row"] = _argmax(row_viol)
    out["max_bound_violation"] = _max(col_viol)
    out["worst_column"] = _argmax(col_viol)
    out["improvement"] = improvement
    out["improvement_rel"] = improvement / c_norm if c_norm > 0 else 0.0
    failures = []
    if out["max_row_violation"] > tol:
        failures.append("direction leaves a row's recession cone")
    if out["max_bound_violation"] > tol:
        failures.append("direction leaves a column's recession cone")
    if not out["improvement_rel"] > tol:
        failures.append("objective does not improve along the direction")
    out["failures"] = failures
    out["passed"] = not failures
    return out
