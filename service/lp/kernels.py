"""Compiled inner loops of the simplex iterations (numba).

A pivot touches every one of the N = n + m variables several times (the ratio
test over the pivot row, the dual update, the infeasibility sums of the pivot
log) and every basic row (the primal update, the steepest-edge weights, the
choice of the next leaving row). As numpy expressions each of those is a few
whole-vector passes with temporaries, plus the interpreter's overhead per
call; at 10,000 rows that was about two thirds of a pivot's time. Here each
step is one compiled pass over its data.

Every kernel makes the same choices as the numpy expression it replaced (same
candidates, same tie-breaking: the first index wins); sums may differ in the
last bits where the order of addition changed. ``nogil`` lets gunicorn threads
solve side by side; ``cache`` keeps the machine code under __pycache__ (or
NUMBA_CACHE_DIR) so only the first process on a machine pays to compile.

Status codes are those of basis.Status (BASIC 0, AT_LOWER 1, AT_UPPER 2,
FIXED 3, FREE 4).
"""

from __future__ import annotations

import numba
import numpy as np

_JIT = {"cache": True, "nogil": True}
# Indices read from arrays are cast to unsigned before they index another
# array: numba wraps negative signed indices (a compare and branch on every
# access); an unsigned index has no such check. This made the LU solves about
# a third faster. Loop counters from range(0, n) need no cast.
_u = np.uint64

_AT_LOWER = 1
_AT_UPPER = 2
_FREE = 4

RULE_STEEPEST_EDGE = 0
RULE_DANTZIG = 1
RULE_SMALLEST_INDEX = 2


@numba.njit(inline="always", **_JIT)
def _dual_infeasibility(dj, st):
    """How far reduced cost dj is on the wrong side for status st."""
    if st == _AT_LOWER:
        return -dj if dj < 0.0 else 0.0
    if st == _AT_UPPER:
        return dj if dj > 0.0 else 0.0
    if st == _FREE:
        return abs(dj)
    return 0.0


@numba.njit(**_JIT)
def dual_ratio_test(
    status, vals, nz, count, d, lower, upper, s, pivot_tol, dual_tol, primal_tol, slope, can_flip, bland
):
    """Harris two-pass ratio test with bound flipping over one pivot row.

    The row comes as its nonzeros at nonbasic columns (from pivot_row):
    column nz[e] has entry vals[e], e < count, columns increasing. Candidates: nonbasic columns whose
    pivot-row entry (times s) moves the leaving row toward feasibility,
    |entry| > pivot_tol. Rounds take, among the candidates left, the group
    whose ratio is within the smallest Harris bound; a group is flipped when
    the slope left pays for it (by more than primal_tol), otherwise the
    group's largest |entry| enters (Bland: the smallest index). Returns
    (q, t, flips, dinf, entry) with q = -1 when nothing can enter; dinf is
    the dual infeasibility of the nz columns before the pivot (for the pivot
    log's running sum, see dual_update), entry is q's pivot-row entry.
    """
    cand = np.empty(count, np.int64)
    where = np.empty(count, np.int64)
    a_abs = np.empty(count)
    ratio = np.empty(count)
    harris = np.empty(count)
    reach = np.empty(count)
    dinf = 0.0
    k = 0
    for e in range(count):
        j = _u(nz[e])
        st = status[j]
        a = vals[e]
        dinf += _dual_infeasibility(d[j], st)
        if st == _AT_LOWER:
            ok = (a < -pivot_tol) if s > 0 else (a > pivot_tol)
        elif st == _AT_UPPER:
            ok = (a > pivot_tol) if s > 0 else (a < -pivot_tol)
        elif st == _FREE:
            ok = abs(a) > pivot_tol
        else:
            ok = False
        if not ok:
            continue
        aa = abs(s * a)
        if st == _FREE:
            dt = 0.0
            reach[k] = np.inf
        else:
            dt = -d[j] if st == _AT_UPPER else d[j]
            reach[k] = (upper[j] - lower[j]) * aa
        cand[k] = j
        where[k] = e
        a_abs[k] = aa
        ratio[k] = dt / aa
        harris[k] = (dt + dual_tol) / aa
        k += 1
    flips = np.empty(k, np.int64)
    nflips = 0
    if k == 0:
        return -1, 0.0, flips[:0], dinf, 0.0
    alive = np.ones(k, np.bool_)
    left = k
    while left > 0:
        tmax = np.inf
        for i in range(k):
            if alive[i] and harris[i] < tmax:
                tmax = harris[i]
        need = 0.0
        for i in range(k):
            if alive[i] and ratio[i] <= tmax:
                need += reach[i]
        if can_flip and np.isfinite(need) and slope - need > primal_tol:
            for i in range(k):
                if alive[i] and ratio[i] <= tmax:
                    flips[nflips] = cand[i]
                    nflips += 1
                    alive[i] = False
                    left -= 1
            slope -= need
            continue
        best = -1
        for i in range(k):
            if alive[i] and ratio[i] <= tmax:
                if best < 0:
                    best = i
                elif bland:
                    if cand[i] < cand[best]:
                        best = i
                elif a_abs[i] > a_abs[best]:
                    best = i
        t = ratio[best]
        if t < 0.0:
            t = 0.0
        return cand[best], t, flips[:nflips], dinf, vals[where[best]]
    # every candidate could be flipped with slope to spare: dual unbounded
    return -1, 0.0, flips[:0], dinf, 0.0


@numba.njit(**_JIT)
def primal_infeasibilities(x, basic_idx, lower, upper, out):
    """out[i] = amount basic i is below its lower (negative) or above its upper
    (positive) bound, else 0. Returns sum |out|."""
    total = 0.0
    for i in range(basic_idx.size):
        j = _u(basic_idx[i])
        below = x[j] - lower[j]
        if below < 0.0:
            out[i] = below
            total -= below
        else:
            above = x[j] - upper[j]
            if above > 0.0:
                out[i] = above
                total += above
            else:
                out[i] = 0.0
    return total


@numba.njit(**_JIT)
def choose_row(infeas, dse, basic_idx, tol, rule):
    """The leaving row among |infeas| > tol: largest infeas^2 / weight (dual
    steepest edge), largest |infeas| (Dantzig) or smallest variable index
    (Bland). -1 when the basis is primal feasible."""
    best = -1
    best_score = 0.0
    for i in range(infeas.size):
        v = infeas[i]
        if abs(v) <= tol:
            continue
        if rule == RULE_SMALLEST_INDEX:
            if best < 0 or basic_idx[i] < basic_idx[best]:
                best = i
            continue
        score = v * v / dse[i] if rule == RULE_STEEPEST_EDGE else abs(v)
        if best < 0 or score > best_score:
            best = i
            best_score = score
    return best


@numba.njit(**_JIT)
def dual_infeasibility_sum(d, status):
    """Sum over nonbasics of how far d is on the wrong side for the status."""
    total = 0.0
    for j in range(d.size):
        total += _dual_infeasibility(d[j], status[j])
    return total


@numba.njit(**_JIT)
def pivot_row(ptr, idx, val, rho, status, n, nz, vals):
    """The pivot row alpha_r = Af^T rho = [A^T rho, -rho] at the nonbasic
    variables, as its nonzeros: column nz[e] has entry vals[e], columns
    increasing; returns their count. (ptr, idx, val) is A^T as CSR (A's
    columns as rows); each entry sums in storage order, as scipy's CSR
    product does. Basic columns (alpha_r = 0 there) are skipped."""
    k = 0
    for j in range(n):
        if status[j] == 0:
            continue
        acc = 0.0
        for p in range(_u(ptr[j]), _u(ptr[j + 1])):
            acc += val[p] * rho[_u(idx[p])]
        if acc != 0.0:
            nz[k] = j
            vals[k] = acc
            k += 1
    for i in range(rho.size):
        if status[n + i] != 0 and rho[i] != 0.0:
            nz[k] = n + i
            vals[k] = -rho[i]
            k += 1
    return k


@numba.njit(**_JIT)
def dual_update(d, y, vals, nz, count, rho, step, status):
    """The dual update of a dual pivot over the pivot row's nonzeros
    (column nz[e] has entry vals[e], e < count): d += step * alpha_r,
    y -= step * rho (nothing moves when step is 0). Returns the dual
    infeasibility of those columns afterwards, with ``status`` (the statuses
    after the pivot): with dual_ratio_test's figure from before, the pivot
    log's dual infeasibility is kept up to date without a pass over every
    variable."""
    total = 0.0
    move = step != 0.0
    for e in range(count):
        j = _u(nz[e])
        dj = d[j]
        if move:
            dj += step * vals[e]
            d[j] = dj
        total += _dual_infeasibility(dj, status[j])
    if move:
        for i in range(y.size):
            y[i] -= step * rho[i]
    return total


@numba.njit(**_JIT)
def eta_append(alpha_q, r, idx, vals, start):
    """Write the entries of alpha_q other than row r that are nonzero to
    idx/vals from ``start`` on (room for alpha_q.size - 1 is the caller's
    job). Returns the end."""
    k = start
    for i in range(alpha_q.size):
        v = alpha_q[i]
        if v != 0.0 and i != r:
            idx[k] = i
            vals[k] = v
            k += 1
    return k


@numba.njit(**_JIT)
def dual_primal_step(x, basic_idx, alpha_q, flip_shift, r, bound, piv):
    """The primal update of a dual pivot: the bound flips' shift of the basics
    (flip_shift has length 0 when nothing flipped), then the step that takes
    the leaving basic (row r) to ``bound``. Returns that step, theta_p."""
    has_flips = flip_shift.size > 0
    p = _u(basic_idx[r])
    xp = x[p] - flip_shift[r] if has_flips else x[p]
    theta = (xp - bound) / piv
    for i in range(basic_idx.size):
        j = _u(basic_idx[i])
        v = x[j] - flip_shift[i] if has_flips else x[j]
        x[j] = v - theta * alpha_q[i]
    return theta


@numba.njit(**_JIT)
def update_dse(dse, alpha_q, tau, piv, r):
    """Dual steepest-edge weights after a pivot in row r (Forrest and Goldfarb 1992)."""
    wr = dse[r]
    for i in range(dse.size):
        ratio = alpha_q[i] / piv
        w = dse[i] - 2.0 * ratio * tau[i] + ratio * ratio * wr
        dse[i] = w if w > 1e-8 else 1e-8
    w = wr / (piv * piv)
    dse[r] = w if w > 1e-8 else 1e-8


@numba.njit(**_JIT)
def flip_column(indptr, indices, data, n, m, flip_idx, shift):
    """Af @ dx for the bound flips, dx nonzero only at flip_idx (amounts ``shift``)."""
    out = np.zeros(m)
    for k in range(flip_idx.size):
        j = flip_idx[k]
        dx = shift[k]
        if j < n:
            for p in range(_u(indptr[j]), _u(indptr[j + 1])):
                out[_u(indices[p])] += data[p] * dx
        else:
            out[j - n] -= dx
    return out


@numba.njit(**_JIT)
def eta_ftran(v, rows, pivots, starts, idx, vals, count):
    """Apply the first ``count`` eta records to v (m x k, in place), in order."""
    for e in range(count):
        r = _u(rows[e])
        piv = pivots[e]
        lo, hi = _u(starts[e]), _u(starts[e + 1])
        for c in range(v.shape[1]):
            vr = v[r, c]
            if vr != 0.0:
                vr = vr / piv
                for p in range(lo, hi):
                    v[_u(idx[p]), c] -= vals[p] * vr
                v[r, c] = vr


@numba.njit(**_JIT)
def eta_btran(h, rows, pivots, starts, idx, vals, count):
    """Apply the first ``count`` eta records transposed to h (in place), last first."""
    for e in range(count - 1, -1, -1):
        r = _u(rows[e])
        acc = 0.0
        for p in range(_u(starts[e]), _u(starts[e + 1])):
            acc += vals[p] * h[_u(idx[p])]
        h[r] = (h[r] - acc) / pivots[e]


@numba.njit(inline="always", **_JIT)
def _spread(z, zj, ptr, idx, val, j):
    """z[i, :] -= M[i, j] * zj for the off-diagonal entries of column j of M (CSC)."""
    for p in range(_u(ptr[j]), _u(ptr[j + 1])):
        i = _u(idx[p])
        if i != j:
            mij = val[p]
            for c in range(zj.size):
                z[i, c] -= mij * zj[c]


@numba.njit(**_JIT)
def lu_solve(Lp, Li, Lx, Up, Ui, Ux, Ud, src, dst, a):
    """Solve B v = a for each column of a (m x k) with B's LU factors.

    The factorization's row and column orders are folded into src and dst:
    z = a[src], L U u = z, v[dst] = u. Column-oriented substitution, one pass
    over each column of L and U for all right-hand sides, skips every column
    whose multipliers are all zero, so a sparse right-hand side (a pivot
    column, a unit vector) costs only what it touches."""
    m, k = a.shape
    z = np.empty((m, k))
    for i in range(m):
        si = _u(src[i])
        for c in range(k):
            z[i, c] = a[si, c]
    zj = np.empty(k)
    for j in range(m):  # L, unit diagonal
        nonzero = False
        for c in range(k):
            zj[c] = z[j, c]
            nonzero = nonzero or zj[c] != 0.0
        if nonzero:
            _spread(z, zj, Lp, Li, Lx, _u(j))
    for jj in range(m):  # U, last column first
        j = _u(m - 1 - jj)
        nonzero = False
        for c in range(k):
            zj[c] = z[j, c] / Ud[j]
            z[j, c] = zj[c]
            nonzero = nonzero or zj[c] != 0.0
        if nonzero:
            _spread(z, zj, Up, Ui, Ux, j)
    v = np.empty((m, k))
    for i in range(m):
        di = _u(dst[i])
        for c in range(k):
            v[di, c] = z[i, c]
    return v


@numba.njit(**_JIT)
def lu_solve_one(Lp, Li, Lx, Up, Ui, Ux, Ud, src, dst, a, out):
    """lu_solve for one right-hand side a, into out (both may be strided views)."""
    m = a.size
    z = np.empty(m)
    for i in range(m):
        z[i] = a[_u(src[i])]
    for jj in range(m):  # L, unit diagonal
        j = _u(jj)
        zj = z[j]
        if zj != 0.0:
            for p in range(_u(Lp[j]), _u(Lp[j + 1])):
                i = _u(Li[p])
                if i != j:
                    z[i] -= Lx[p] * zj
    for jj in range(m):  # U, last column first
        j = _u(m - 1 - jj)
        zj = z[j] / Ud[j]
        z[j] = zj
        if zj != 0.0:
            for p in range(_u(Up[j]), _u(Up[j + 1])):
                i = _u(Ui[p])
                if i != j:
                    z[i] -= Ux[p] * zj
    for i in range(m):
        out[_u(dst[i])] = z[i]


@numba.njit(inline="always", **_JIT)
def _spread_pair(za, zb, ja, jb, ptr, idx, val, j):
    """za[i] -= M[i, j] * ja, zb[i] -= M[i, j] * jb for the off-diagonal entries of column j (CSC)."""
    for p in range(_u(ptr[j]), _u(ptr[j + 1])):
        i = _u(idx[p])
        if i != j:
            mij = val[p]
            za[i] -= mij * ja
            zb[i] -= mij * jb


@numba.njit(**_JIT)
def lu_solve_pair(Lp, Li, Lx, Up, Ui, Ux, Ud, src, dst, a, b, out_a, out_b):
    """lu_solve for two right-hand sides at once (a pivot column and the DSE
    vector): one pass over L and U, the two multipliers in registers; about
    twice as fast as the general m x k loop for k = 2."""
    m = a.size
    za = np.empty(m)
    zb = np.empty(m)
    for i in range(m):
        si = _u(src[i])
        za[i] = a[si]
        zb[i] = b[si]
    for jj in range(m):  # L, unit diagonal
        j = _u(jj)
        ja = za[j]
        jb = zb[j]
        if ja != 0.0 or jb != 0.0:
            _spread_pair(za, zb, ja, jb, Lp, Li, Lx, j)
    for jj in range(m):  # U, last column first
        j = _u(m - 1 - jj)
        ja = za[j] / Ud[j]
        jb = zb[j] / Ud[j]
        za[j] = ja
        zb[j] = jb
        if ja != 0.0 or jb != 0.0:
            _spread_pair(za, zb, ja, jb, Up, Ui, Ux, j)
    for i in range(m):
        di = _u(dst[i])
        out_a[di] = za[i]
        out_b[di] = zb[i]


@numba.njit(**_JIT)
def lu_solve_t(Lp, Li, Lx, Up, Ui, Ux, Ud, src, dst, e):
    """Solve B^T h = e with the same factors: s = e[dst], U^T L^T t = s, h[src] = t."""
    m = e.size
    s = np.empty(m)
    for i in range(m):
        s[i] = e[_u(dst[i])]
    for jj in range(m):  # U^T (lower triangular)
        j = _u(jj)
        acc = s[j]
        for p in range(_u(Up[j]), _u(Up[j + 1])):
            i = _u(Ui[p])
            if i != j:
                acc -= Ux[p] * s[i]
        s[j] = acc / Ud[j]
    for jj in range(m):  # L^T (upper triangular, unit diagonal), last column first
        j = _u(m - 1 - jj)
        acc = s[j]
        for p in range(_u(Lp[j]), _u(Lp[j + 1])):
            i = _u(Li[p])
            if i != j:
                acc -= Lx[p] * s[i]
        s[j] = acc
    h = np.empty(m)
    for i in range(m):
        h[_u(src[i])] = s[i]
    return h


@numba.njit(**_JIT)
def append_rows_csc(indptr, indices, data, add_indptr, add_indices, add_data, m0):
    """CSC arrays of A with rows appended: A (m0 rows) and the new rows N, both
    CSC over the same columns, N's row numbers counted from 0. Each column is
    A's entries followed by N's (shifted by m0), so row order stays sorted."""
    n = indptr.size - 1
    nnz = indptr[n] + add_indptr[n]
    out_ptr = np.empty(n + 1, indptr.dtype)
    out_idx = np.empty(nnz, indices.dtype)
    out_val = np.empty(nnz)
    k = 0
    out_ptr[0] = 0
    for j in range(n):
        for p in range(indptr[j], indptr[j + 1]):
            out_idx[k] = indices[p]
            out_val[k] = data[p]
            k += 1
        for p in range(add_indptr[j], add_indptr[j + 1]):
            out_idx[k] = add_indices[p] + m0
            out_val[k] = add_data[p]
            k += 1
        out_ptr[j + 1] = k
    return out_ptr, out_idx, out_val


@numba.njit(**_JIT)
def basis_csc(indptr, indices, data, n, bcols):
    """CSC arrays of the basis matrix B = [A | -I][:, bcols]: a structural
    column copied from A (CSC, sorted rows), a logical n + i as -e_i."""
    m = bcols.size
    nnz = 0
    for k in range(m):
        j = bcols[k]
        nnz += indptr[j + 1] - indptr[j] if j < n else 1
    out_ptr = np.empty(m + 1, np.int64)
    out_idx = np.empty(nnz, np.int64)
    out_val = np.empty(nnz)
    p = 0
    out_ptr[0] = 0
    for k in range(m):
        j = bcols[k]
        if j < n:
            for q in range(indptr[j], indptr[j + 1]):
                out_idx[p] = indices[q]
                out_val[p] = data[q]
                p += 1
        else:
            out_idx[p] = j - n
            out_val[p] = -1.0
            p += 1
        out_ptr[k + 1] = p
    return out_ptr, out_idx, out_val


@numba.njit(**_JIT)
def permute_csc(indptr, indices, data, row_perm, col_perm):
    """CSC arrays of B[row_perm][:, col_perm] with each column's rows sorted
    (insertion sort: basis columns hold a handful of entries)."""
    m = row_perm.size
    inv = np.empty(m, np.int64)
    for i in range(m):
        inv[row_perm[i]] = i
    ncol = col_perm.size
    out_ptr = np.empty(ncol + 1, np.int64)
    out_idx = np.empty(indices.size, np.int64)
    out_val = np.empty(indices.size)
    p = 0
    out_ptr[0] = 0
    for k in range(ncol):
        j = col_perm[k]
        start = p
        for q in range(indptr[j], indptr[j + 1]):
            r = inv[indices[q]]
            v = data[q]
            t = p
            while t > start and out_idx[t - 1] > r:
                out_idx[t] = out_idx[t - 1]
                out_val[t] = out_val[t - 1]
                t -= 1
            out_idx[t] = r
            out_val[t] = v
            p += 1
        out_ptr[k + 1] = p
    return out_ptr, out_idx, out_val


def warm_up() -> None:
    """Compile (or load from the cache) every kernel on tiny inputs, so the
    first real request does not pay for it."""
    st = np.array([1, 2, 4, 0], dtype=np.int8)
    v = np.array([1.0, -1.0, 0.5, 0.0])
    idx = np.arange(4, dtype=np.int64)
    dual_ratio_test(st, v, idx.astype(np.int32), 4, v.copy(), -np.ones(4), np.ones(4), 1.0, 1e-9, 1e-7, 1e-7, 1.0,
                    True, False)  # fmt: skip
    out = np.zeros(4)
    primal_infeasibilities(v, idx, -np.ones(4), np.ones(4), out)
    choose_row(v, np.ones(4), idx, 1e-7, RULE_STEEPEST_EDGE)
    dual_infeasibility_sum(v, st)
    nz = idx.astype(np.int32)
    dual_update(v.copy(), v.copy(), v, nz, 4, v, 0.5, st)
    pivot_row(np.array([0, 1, 2], dtype=np.int32), np.array([0, 1], dtype=np.int32), np.ones(2), v[:2], st, 2,
              nz.copy(), np.zeros(4))  # fmt: skip
    pivot_row(idx[:3], idx[:2], np.ones(2), v[:2], st, 2, nz.copy(), np.zeros(4))
    eta_append(v, 0, np.zeros(4, dtype=np.int64), np.zeros(4), 0)
    dual_primal_step(v.copy(), idx, v, np.zeros(0), 0, 0.0, 1.0)
    update_dse(np.ones(4), v, v, 1.0, 0)
    flip_column(np.array([0, 1], dtype=np.int32), np.array([0], dtype=np.int32), np.ones(1), 1, 3,
                idx[:2], np.ones(2))  # fmt: skip
    eta_ftran(np.ones((4, 2)), idx[:1], np.ones(1), np.array([0, 1], dtype=np.int64), idx[1:2], v[:1], 1)
    i32 = np.array([0, 1], dtype=np.int32)
    append_rows_csc(i32, i32[:1], np.ones(1), i32, i32[:1], np.ones(1), 1)
    ptr, i32 = np.arange(5, dtype=np.int32), idx.astype(np.int32)  # L and U as Factor keeps them
    lu = (ptr, i32, np.ones(4), ptr, i32, np.ones(4), np.ones(4), idx, idx)
    lu_solve(*lu, np.ones((4, 2)))
    lu_solve_t(*lu, np.ones(4))
    two = np.ones((4, 2))
    for a, b in ((two[:, 0], two[:, 1]), (np.ones(4), np.ones(4))):  # strided views and plain vectors
        lu_solve_pair(*lu, a, b, a, b)
        lu_solve_one(*lu, a, b)
    lu_solve_pair(*lu, np.ones(4), np.ones(4)[::-1], np.ones(4), np.ones(4))  # a reversed view (A layout) too
    eta_btran(np.ones(4), idx[:1], np.ones(1), np.array([0, 1], dtype=np.int64), idx[1:2], v[:1], 1)
    for ints in (np.int32, np.int64):  # scipy keeps either index type
        bptr, bidx, bval = basis_csc(np.array([0, 1], dtype=ints), np.array([0], dtype=ints), np.ones(1), 1,
                                     np.array([0, 2], dtype=np.int64))  # fmt: skip
        permute_csc(bptr.astype(ints), bidx.astype(ints), bval, idx[:2][::-1].copy(), idx[:2][::-1].copy())
