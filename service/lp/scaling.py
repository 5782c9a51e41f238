"""Scaling of the constraint matrix before solving.

Geometric-mean scaling passes followed by equilibration, with every factor
rounded to a power of two so that scaling and unscaling are exact in binary
floating point (common practice in simplex codes). Scaled data:

    A_s = diag(R) @ A @ diag(S)
    x_s = x / S,  c_s = c * S,  column bounds / S
    r_s = R * r  (row activities),  row bounds * R
    y   = R * y_s (duals),  d = d_s / S (reduced costs)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp


@dataclass
class Scaling:
    row: np.ndarray  # R, length m
    col: np.ndarray  # S, length n


def _pow2(v: np.ndarray) -> np.ndarray:
    return np.exp2(np.round(np.log2(v)))


def compute_scaling(A: sp.csc_matrix, passes: int = 4) -> Scaling:
    m, n = A.shape
    R = np.ones(m)
    S = np.ones(n)
    if A.nnz == 0:
        return Scaling(R, S)
    coo = A.tocoo()
    rows, cols = coo.row, coo.col
    absval = np.abs(coo.data)
    keep = absval > 0
    rows, cols, absval = rows[keep], cols[keep], absval[keep]
    if absval.size == 0:
        return Scaling(R, S)
    logs = np.log2(absval)
    log_r = np.zeros(m)
    log_s = np.zeros(n)
    for _ in range(passes):
        cur = logs + log_r[rows] + log_s[cols]
        # geometric mean of max and min per row, then per column
        rmax = np.full(m, -np.inf)
        rmin = np.full(m, np.inf)
        np.maximum.at(rmax, rows, cur)
        np.minimum.at(rmin, rows, cur)
        has = np.isfinite(rmax)
        log_r[has] -= 0.5 * (rmax[has] + rmin[has])
        cur = logs + log_r[rows] + log_s[cols]
        cmax = np.full(n, -np.inf)
        cmin = np.full(n, np.inf)
        np.maximum.at(cmax, cols, cur)
        np.minimum.at(cmin, cols, cur)
        has = np.isfinite(cmax)
        log_s[has] -= 0.5 * (cmax[has] + cmin[has])
    # equilibrate: largest entry of each column becomes about 1
    cur = logs + log_r[rows] + log_s[cols]
    cmax = np.full(n, -np.inf)
    np.maximum.at(cmax, cols, cur)
    has = np.isfinite(cmax)
    log_s[has] -= cmax[has]
    R = np.exp2(np.round(np.clip(log_r, -60, 60)))
    S = np.exp2(np.round(np.clip(log_s, -60, 60)))
    return Scaling(R, S)


def scale_matrix(A: sp.csc_matrix, sc: Scaling) -> sp.csc_matrix:
    As = sp.diags(sc.row) @ A @ sp.diags(sc.col)
    return sp.csc_matrix(As)
