"""Classical sensitivity ranging at an optimal basis.

Cost ranging: the interval of c_j over which the basis stays optimal.
  - nonbasic j: its own reduced cost limits the move toward "attractive";
  - basic j in row r: a cost change delta moves every nonbasic reduced cost
    by -delta * alpha_rk (alpha_r = row r of B^-1 N), so a ratio test over the
    pivot row gives the interval (Dantzig 1963; Chvatal 1983, ch. 10).
RHS ranging: the interval of a row's active bound over which its shadow price
stays valid, i.e. the basis stays primal feasible: moving the bound of a
binding row i by delta moves x_B by delta * B^-1 e_i; a ratio test over the
basics gives the interval. For a row that is not binding, the shadow price is
zero and stays so while the bound does not cut the current activity.

Work is done on the unscaled data with a fresh factorization, in blocks of
right-hand sides so no per-column Python loop touches the large dimension.
Results are in the user's objective sense (maximization reported as such).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from .basis import Basis, Status, normalize_nonbasic
from .factor import Factor
from .model import LinearProgram
from .result import Ranging

BLOCK = 64


def _full_basis_matrix(lp: LinearProgram, basic: np.ndarray) -> sp.csc_matrix:
    n, m = lp.n, lp.m
    struct = basic[basic < n]
    slots_s = np.flatnonzero(basic < n)
    slots_l = np.flatnonzero(basic >= n)
    cols = lp.A[:, struct]
    rows = np.concatenate([cols.indices, basic[basic >= n] - n])
    colidx = np.concatenate([np.repeat(slots_s, np.diff(cols.indptr)), slots_l])
    data = np.concatenate([cols.data, -np.ones(slots_l.size)])
    return sp.csc_matrix((data, (rows, colidx)), shape=(m, m))


def compute_ranging(
    lp: LinearProgram,
    basis: Basis,
    x: np.ndarray,
    shadow_price: np.ndarray,
    reduced_cost: np.ndarray,
    tol: float = 1e-9,
) -> Ranging:
    n, m = lp.n, lp.m
    sense = lp.sense
    basis = normalize_nonbasic(basis, lp)  # equality rows and fixed columns: FIXED
    status = np.concatenate([basis.col_status, basis.row_status])
    basic = np.flatnonzero(status == Status.BASIC)
    factor = Factor(_full_basis_matrix(lp, basic))
    lower = np.concatenate([lp.col_lower, lp.row_lower])
    upper = np.concatenate([lp.col_upper, lp.row_upper])
    xfull = np.concatenate([x, lp.A @ x])
    # reduced costs in minimization form for every variable (logicals: d = y)
    d_min = np.concatenate([sense * reduced_cost, sense * shadow_price])
    c_min = sense * lp.c

    # ---------------- cost ranging (minimization form first)
    lo = np.full(n, -np.inf)
    hi = np.full(n, np.inf)
    nb = status[:n] != Status.BASIC
    st = status[:n]
    at_l = nb & (st == Status.AT_LOWER)
    at_u = nb & (st == Status.AT_UPPER)
    free = nb & (st == Status.FREE)
    lo[at_l] = c_min[at_l] - d_min[:n][at_l]
    hi[at_u] = c_min[at_u] - d_min[:n][at_u]
    lo[free] = hi[free] = c_min[free]

    nonbasic = np.flatnonzero(status != Status.BASIC)
    nb_status = status[nonbasic]
    nb_d = d_min[nonbasic]
    basic_struct_rows = np.flatnonzero(basic < n)
    AT = sp.csr_matrix(lp.A.T)
    for start in range(0, basic_struct_rows.size, BLOCK):
        rows = basic_struct_rows[start : start + BLOCK]
        E = np.zeros((m, rows.size))
        E[rows, np.arange(rows.size)] = 1.0
        rho = factor.solve_block_t(E)  # m x k
        alpha = np.vstack([AT @ rho, -rho])[nonbasic]  # |N| x k
        dlo, dhi = _cost_ratio(alpha, nb_status[:, None], nb_d[:, None], tol)
        j = basic[rows]
        lo[j] = c_min[j] + dlo
        hi[j] = c_min[j] + dhi

    # ---------------- RHS ranging
    rlo = np.full(m, -np.inf)
    rhi = np.full(m, np.inf)
    row_st = status[n:]
    act = xfull[n:]
    basic_row = row_st == Status.BASIC
    # non-binding rows: the bound may move until it reaches the activity
    up_side = basic_row & np.isfinite(lp.row_upper)
    lo_side = basic_row & ~np.isfinite(lp.row_upper) & np.isfinite(lp.row_lower)
    rlo[up_side] = act[up_side]
    rhi[lo_side] = act[lo_side]
    binding = np.flatnonzero(~basic_row)
    xb = xfull[basic]
    lb, ub = lower[basic], upper[basic]
    for start in range(0, binding.size, BLOCK):
        rows = binding[start : start + BLOCK]
        E = np.zeros((m, rows.size))
        E[rows, np.arange(rows.size)] = 1.0
        w = factor.solve_block(E)  # dx_B / d(bound) per column
        up_room = np.where(w > tol, (ub[:, None] - xb[:, None]) / np.where(w > tol, w, 1.0), np.inf)
        up_room = np.minimum(
            up_room, np.where(w < -tol, (lb[:, None] - xb[:, None]) / np.where(w < -tol, w, 1.0), np.inf)
        )
        dn_room = np.where(w > tol, (xb[:, None] - lb[:, None]) / np.where(w > tol, w, 1.0), np.inf)
        dn_room = np.minimum(
            dn_room, np.where(w < -tol, (ub[:, None] - xb[:, None]) / np.where(w < -tol, -w, 1.0), np.inf)
        )
        inc = np.maximum(up_room.min(axis=0), 0.0)
        dec = np.maximum(dn_room.min(axis=0), 0.0)
        bound = act[rows]
        rlo[rows] = bound - dec
        rhi[rows] = bound + inc
        # a ranged row's active bound cannot cross its other bound
        at_up = row_st[rows] == Status.AT_UPPER
        at_lo = row_st[rows] == Status.AT_LOWER
        rlo[rows[at_up]] = np.maximum(rlo[rows[at_up]], lp.row_lower[rows[at_up]])
        rhi[rows[at_lo]] = np.minimum(rhi[rows[at_lo]], lp.row_upper[rows[at_lo]])

    if sense < 0:  # c_user = -c_min
        lo, hi = -hi, -lo
    return Ranging(cost_lower=lo, cost_upper=hi, rhs_lower=rlo, rhs_upper=rhi)


def _cost_ratio(alpha, nb_status, nb_d, tol):
    """Interval [dlo, dhi] of a basic cost change keeping nonbasic d dual feasible.

    d_k(delta) = d_k - delta * alpha_rk in minimization form.
    """
    at_l = nb_status == Status.AT_LOWER
    at_u = nb_status == Status.AT_UPPER
    free = nb_status == Status.FREE
    pos = alpha > tol
    neg = alpha < -tol
    safe = np.where(np.abs(alpha) > tol, alpha, 1.0)
    ratio = nb_d / safe
    # upper limit on delta
    up_lim = np.where((at_l & pos) | (at_u & neg), ratio, np.inf)
    up_lim = np.where(free & (pos | neg), 0.0, up_lim)
    lo_lim = np.where((at_l & neg) | (at_u & pos), ratio, -np.inf)
    lo_lim = np.where(free & (pos | neg), 0.0, lo_lim)
    dhi = np.maximum(up_lim.min(axis=0, initial=np.inf), 0.0)
    dlo = np.minimum(lo_lim.max(axis=0, initial=-np.inf), 0.0)
    return dlo, dhi
