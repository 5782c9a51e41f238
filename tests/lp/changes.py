"""Change sets for warm re-optimization tests: each takes a solved model and
returns a changed LinearProgram, the way a planner's edits would arrive
(a cut through the current plan, a new column, tighter bounds, new costs,
a removed constraint, or several at once)."""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from service.lp import LinearProgram, SolveResult, Status


def _rebuild(lp: LinearProgram, **kw) -> LinearProgram:
    fields = dict(
        A=lp.A,
        c=lp.c,
        col_lower=lp.col_lower,
        col_upper=lp.col_upper,
        row_lower=lp.row_lower,
        row_upper=lp.row_upper,
        sense=lp.sense,
        offset=lp.offset,
        col_names=list(lp.col_names),
        row_names=list(lp.row_names),
        name=lp.name,
    )
    fields.update(kw)
    return LinearProgram(**fields)


def add_rows(
    lp: LinearProgram, rows: list[tuple[np.ndarray, float, float]], prefix: str = "cut"
) -> LinearProgram:
    extra = sp.csr_matrix(np.vstack([r[0] for r in rows]))
    return _rebuild(
        lp,
        A=sp.vstack([lp.A, extra]).tocsc(),
        row_lower=np.r_[lp.row_lower, [r[1] for r in rows]],
        row_upper=np.r_[lp.row_upper, [r[2] for r in rows]],
        row_names=list(lp.row_names) + [f"{prefix}{k}" for k in range(len(rows))],
    )


def cut_through(
    lp: LinearProgram, x: np.ndarray, rng: np.random.Generator
) -> tuple[np.ndarray, float, float]:
    """A row a @ x <= b that the current plan x violates by 5 % of its value."""
    nz = np.flatnonzero(np.abs(x) > 1e-9)
    if nz.size == 0:
        nz = np.arange(lp.n)
    pick = rng.choice(nz, size=min(nz.size, int(rng.integers(2, 8))), replace=False)
    a = np.zeros(lp.n)
    a[pick] = rng.uniform(0.5, 2.0, pick.size) * np.where(x[pick] < 0, -1.0, 1.0)
    v = float(a @ x)
    return a, -np.inf, v - 0.05 * abs(v) - 1e-3


def one_cut(lp, res, rng):
    return add_rows(lp, [cut_through(lp, res.x, rng)])


def three_cuts(lp, res, rng):
    return add_rows(lp, [cut_through(lp, res.x, rng) for _ in range(3)])


def profitable_column(lp: LinearProgram, res: SolveResult, rng: np.random.Generator) -> LinearProgram:
    """A new column whose reduced cost at the current duals is attractive."""
    k = int(min(lp.m, rng.integers(2, 6)))
    rows = rng.choice(lp.m, size=k, replace=False)
    col = np.zeros(lp.m)
    col[rows] = rng.uniform(0.2, 2.0, k) * rng.choice([-1.0, 1.0], k)
    price = float(col @ res.shadow_price)
    margin = 0.1 * (1.0 + abs(price))
    cost = price - lp.sense * margin  # reduced cost = -sense * margin: improving
    A = sp.hstack([lp.A, sp.csc_matrix(col.reshape(-1, 1))]).tocsc()
    ub = 10.0 * (1.0 + np.abs(res.x).max(initial=0.0))
    return _rebuild(
        lp,
        A=A,
        c=np.r_[lp.c, cost],
        col_lower=np.r_[lp.col_lower, 0.0],
        col_upper=np.r_[lp.col_upper, ub],
        col_names=list(lp.col_names) + ["new_lane"],
    )


def tighter_bound_and_moved_rhs(
    lp: LinearProgram, res: SolveResult, rng: np.random.Generator
) -> LinearProgram:
    col_lower, col_upper = lp.col_lower.copy(), lp.col_upper.copy()
    row_lower, row_upper = lp.row_lower.copy(), lp.row_upper.copy()
    x = res.x
    inside = np.flatnonzero(
        (res.basis.col_status == Status.BASIC) & (x - col_lower > 1e-6) & (col_upper - x > 1e-6)
    )
    if inside.size:
        j = int(rng.choice(inside))
        span = x[j] - col_lower[j] if np.isfinite(col_lower[j]) else abs(x[j]) + 1.0
        col_upper[j] = x[j] - 0.2 * span
    binding = np.flatnonzero(res.basis.row_status != Status.BASIC)
    if binding.size:
        i = int(rng.choice(binding))
        act = res.row_activity[i]
        move = 0.05 * (1.0 + abs(act))
        if res.basis.row_status[i] == Status.AT_UPPER and row_lower[i] < row_upper[i]:
            row_upper[i] = max(act - move, row_lower[i])
        elif res.basis.row_status[i] == Status.AT_LOWER and row_lower[i] < row_upper[i]:
            row_lower[i] = min(act + move, row_upper[i])
        else:  # equality: shift both sides
            row_lower[i] = row_upper[i] = act + move
    return _rebuild(lp, col_lower=col_lower, col_upper=col_upper, row_lower=row_lower, row_upper=row_upper)


def changed_costs(lp: LinearProgram, res: SolveResult, rng: np.random.Generator) -> LinearProgram:
    """Make a few nonbasic columns attractive and nudge every cost a little."""
    c = lp.c * (1.0 + 0.01 * rng.standard_normal(lp.n))
    nb = np.flatnonzero((res.basis.col_status == Status.AT_LOWER) & (np.abs(res.reduced_cost) > 1e-9))
    if nb.size:
        pick = rng.choice(nb, size=min(3, nb.size), replace=False)
        c[pick] -= 2.0 * res.reduced_cost[pick]
    return _rebuild(lp, c=c)


def removed_constraint(lp: LinearProgram, res: SolveResult, rng: np.random.Generator) -> LinearProgram:
    """Remove a binding constraint (its logical is nonbasic), so the basis needs repair."""
    binding = np.flatnonzero(res.basis.row_status != Status.BASIC)
    i = int(rng.choice(binding)) if binding.size else int(rng.integers(lp.m))
    keep = np.r_[0:i, i + 1 : lp.m]
    return _rebuild(
        lp,
        A=lp.A[keep, :].tocsc(),
        row_lower=lp.row_lower[keep],
        row_upper=lp.row_upper[keep],
        row_names=[lp.row_names[k] for k in keep],
    )


def both_broken(lp: LinearProgram, res: SolveResult, rng: np.random.Generator) -> LinearProgram:
    """A cut (primal infeasible) and attractive costs (dual infeasible) together."""
    lp1 = changed_costs(lp, res, rng)
    return add_rows(lp1, [cut_through(lp, res.x, rng)])


SCENARIOS = {
    "a_one_cut": one_cut,
    "b_three_cuts": three_cuts,
    "c_profitable_column": profitable_column,
    "d_bound_and_rhs": tighter_bound_and_moved_rhs,
    "e_changed_costs": changed_costs,
    "f_removed_constraint": removed_constraint,
    "g_primal_and_dual_broken": both_broken,
}
