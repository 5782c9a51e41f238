"""Review of the compact pivot row, the one/two right-hand-side LU kernels, the pair FTRAN and the
running dual infeasibility (service/lp/kernels.py, factor.py, simplex.py `_dual`).

Outside checks:
- pivot rows: scipy.sparse's CSR product A^T rho (with -rho for the logicals);
- LU solves and the pair FTRAN: numpy.linalg.solve of the explicitly updated dense basis matrix;
- dual update and infeasibility sums: plain numpy expressions of the same formulas;
- whole solves: reference solve HiGHS via highspy (service.lp.solve, engine "highs").
The ratio test over the compact row is compared with a straightforward Python port of the
Harris two-pass rule run over the dense row (the form the kernel had before the row was compacted).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from service.lp import LinearProgram, SolveOptions, kernels, slack_basis, solve
from service.lp.factor import BorderedFactor, Factor
from service.lp.simplex import Simplex

INF = np.inf
BASIC, AT_LOWER, AT_UPPER, FIXED, FREE = 0, 1, 2, 3, 4
REPO = Path(__file__).resolve().parents[2]


# ------------------------------------------------------------------ pivot row
def _pivot_row_reference(
    A: sp.csc_matrix, rho: np.ndarray, status: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Nonzeros of [A^T rho, -rho] at the nonbasic positions (scipy's product)."""
    full = np.concatenate([sp.csr_matrix(A.T) @ rho, -rho])
    keep = (status != BASIC) & (full != 0.0)
    pos = np.flatnonzero(keep)
    return pos, full[pos]


@pytest.mark.parametrize("index_dtype", [np.int32, np.int64])
@pytest.mark.parametrize("seed", range(8))
def test_pivot_row_is_the_nonbasic_nonzeros_of_the_scipy_product(index_dtype, seed):
    rng = np.random.default_rng(seed)
    m, n = int(rng.integers(0, 30)), int(rng.integers(0, 40))
    A = sp.random(m, n, density=0.2, random_state=rng, format="lil")
    if n:
        A[:, int(rng.integers(n))] = 0.0  # an empty column
    A = sp.csc_matrix(A)
    AT = sp.csr_matrix(A.T)
    ptr, idx = AT.indptr.astype(index_dtype), AT.indices.astype(index_dtype)
    rho = rng.standard_normal(m) * (rng.random(m) < 0.6)  # zero entries: those logicals drop out
    status = rng.choice([BASIC, AT_LOWER, AT_UPPER, FIXED, FREE], size=n + m).astype(np.int8)
    nz = np.full(n + m, -7, dtype=np.int32)
    vals = np.full(n + m, np.nan)
    count = kernels.pivot_row(ptr, idx, AT.data, rho, status, n, nz, vals)
    pos, ref = _pivot_row_reference(A, rho, status)
    np.testing.assert_array_equal(nz[:count], pos)
    np.testing.assert_allclose(vals[:count], ref, rtol=1e-14, atol=0.0)
    assert np.all(np.diff(nz[:count]) > 0)  # increasing: the ratio test and row_entry rely on it


def test_pivot_row_all_basic_and_empty():
    n, m = 3, 2
    AT = sp.csr_matrix(np.ones((n, m)))
    nz, vals = np.zeros(n + m, np.int32), np.zeros(n + m)
    assert (
        kernels.pivot_row(AT.indptr, AT.indices, AT.data, np.ones(m), np.zeros(n + m, np.int8), n, nz, vals)
        == 0
    )
    empty = sp.csr_matrix((0, 0))
    assert kernels.pivot_row(empty.indptr, empty.indices, empty.data, np.zeros(0), np.zeros(0, np.int8), 0,
                             np.zeros(0, np.int32), np.zeros(0)) == 0  # fmt: skip


# ------------------------------------------------------------------ dual update
def _row_infeasibility(d: np.ndarray, status: np.ndarray) -> float:
    """The dual infeasibility of the given (d, status) pairs, as a numpy expression."""
    return float(
        np.where(status == AT_LOWER, np.maximum(-d, 0.0), 0.0).sum()
        + np.where(status == AT_UPPER, np.maximum(d, 0.0), 0.0).sum()
        + np.where(status == FREE, np.abs(d), 0.0).sum()
    )


@pytest.mark.parametrize("step", [0.0, -0.0, 0.75, -3.5])
@pytest.mark.parametrize("seed", range(4))
def test_dual_update_matches_numpy_and_reports_the_row_share(step, seed):
    rng = np.random.default_rng(50 + seed)
    N, m = 60, 12
    d = rng.standard_normal(N)
    y = rng.standard_normal(m)
    rho = rng.standard_normal(m)
    status = rng.choice([BASIC, AT_LOWER, AT_UPPER, FIXED, FREE], size=N).astype(np.int8)
    nz = np.sort(rng.choice(N, size=25, replace=False)).astype(np.int32)
    vals = rng.standard_normal(nz.size)
    d_ref, y_ref = d.copy(), y.copy()
    d_ref[nz] += step * vals
    y_ref -= step * rho
    d_before = d.copy()
    share = kernels.dual_update(d, y, vals, nz, nz.size, rho, step, status)
    if step == 0.0:  # nothing moves (not even by a rounding of += 0 * a)
        np.testing.assert_array_equal(d, d_before)
    np.testing.assert_allclose(d, d_ref, rtol=1e-15, atol=1e-15)
    np.testing.assert_allclose(y, y_ref, rtol=1e-15, atol=1e-15)
    assert share == pytest.approx(_row_infeasibility(d_ref[nz], status[nz]), rel=1e-13, abs=1e-15)
    # the whole-vector sum is the same function of (d, status)
    assert kernels.dual_infeasibility_sum(d, status) == pytest.approx(
        _row_infeasibility(d, status), rel=1e-13
    )


# ------------------------------------------------------------------ ratio test over the compact row
def _ratio_test_dense(status, alpha, d, lower, upper, s, ptol, dtol, primal_tol, slope, can_flip, bland):
    """Harris two passes with bound flipping over every variable of a dense pivot row."""
    cand, a_abs, ratio, harris, reach = [], [], [], [], []
    for j in range(alpha.size):
        st_j, a = status[j], alpha[j]
        if st_j == AT_LOWER:
            ok = a < -ptol if s > 0 else a > ptol
        elif st_j == AT_UPPER:
            ok = a > ptol if s > 0 else a < -ptol
        else:
            ok = st_j == FREE and abs(a) > ptol
        if not ok:
            continue
        aa = abs(s * a)
        dt = 0.0 if st_j == FREE else (-d[j] if st_j == AT_UPPER else d[j])
        cand.append(j)
        a_abs.append(aa)
        ratio.append(dt / aa)
        harris.append((dt + dtol) / aa)
        reach.append(INF if st_j == FREE else (upper[j] - lower[j]) * aa)
    flips: list[int] = []
    alive = [True] * len(cand)
    while any(alive):
        tmax = min(h for h, a in zip(harris, alive) if a)
        group = [i for i in range(len(cand)) if alive[i] and ratio[i] <= tmax]
        need = sum(reach[i] for i in group)
        if can_flip and np.isfinite(need) and slope - need > primal_tol:
            flips += [cand[i] for i in group]
            for i in group:
                alive[i] = False
            slope -= need
            continue
        best = group[0]
        for i in group[1:]:
            if (cand[i] < cand[best]) if bland else (a_abs[i] > a_abs[best]):
                best = i
        return cand[best], max(ratio[best], 0.0), flips, alpha[cand[best]]
    return -1, 0.0, [], 0.0


@settings(max_examples=120, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1), s=st.sampled_from([1.0, -1.0]), bland=st.booleans(), flip=st.booleans()
)
def test_ratio_test_over_the_compact_row_equals_the_dense_row(seed, s, bland, flip):
    rng = np.random.default_rng(seed)
    N = int(rng.integers(1, 50))
    status = rng.choice([BASIC, AT_LOWER, AT_UPPER, FIXED, FREE], size=N).astype(np.int8)
    alpha = np.round(rng.standard_normal(N), 1) * (rng.random(N) < 0.6)  # ties and exact zeros
    alpha[status == BASIC] = 0.0
    alpha[rng.random(N) < 0.1] = 1e-9  # below the pivot tolerance
    lower = np.where(rng.random(N) < 0.2, -INF, 0.0)
    upper = np.where(rng.random(N) < 0.6, lower + rng.integers(0, 3, N), INF)
    upper = np.where(np.isfinite(lower), upper, INF)
    d = np.round(rng.standard_normal(N), 1)
    d = np.where(status == AT_LOWER, np.abs(d), np.where(status == AT_UPPER, -np.abs(d), d))
    d[rng.random(N) < 0.1] *= -1e-8  # slightly infeasible, inside Harris's tolerance
    slope = float(rng.uniform(0.0, 6.0))
    args = (d, lower, upper, s, 1e-7, 1e-7, 1e-7, slope, flip, bland)
    nz = np.flatnonzero(alpha).astype(np.int32)
    nz = nz[status[nz] != BASIC]
    q, t, flips, dinf, entry = kernels.dual_ratio_test(status, alpha[nz], nz, nz.size, *args)
    q_ref, t_ref, flips_ref, entry_ref = _ratio_test_dense(status, alpha, *args)
    assert (q, t, list(flips), entry) == (q_ref, t_ref, flips_ref, entry_ref)
    assert dinf == pytest.approx(_row_infeasibility(d[nz], status[nz]), rel=1e-13, abs=0.0)
    if q >= 0:
        assert entry == alpha[q] and q not in flips


def test_ratio_test_with_no_candidates_and_an_empty_row():
    status = np.array([AT_LOWER, AT_UPPER], np.int8)
    d = np.array([-0.5, 0.25])  # both infeasible: the row's share is reported even with no entering column
    vals, nz = np.array([1.0, -1.0]), np.array([0, 1], np.int32)
    q, t, flips, dinf, entry = kernels.dual_ratio_test(status, vals, nz, 2, d, np.zeros(2), np.ones(2), 1.0,
                                                       1e-7, 1e-7, 1e-7, 1.0, True, False)  # fmt: skip
    assert (q, t, flips.size, entry) == (-1, 0.0, 0, 0.0) and dinf == pytest.approx(0.75)
    q, t, flips, dinf, entry = kernels.dual_ratio_test(status, vals[:0], nz[:0], 0, d, np.zeros(2), np.ones(2), -1.0,
                                                       1e-7, 1e-7, 1e-7, 1.0, True, False)  # fmt: skip
    assert (q, t, flips.size, dinf, entry) == (-1, 0.0, 0, 0.0, 0.0)


# ------------------------------------------------------------------ LU kernels and the pair FTRAN
def _random_basis(rng: np.random.Generator, m: int) -> np.ndarray:
    """Sparse-ish, diagonally dominant (well conditioned), with some off-triangle entries so the
    block triangular form has nontrivial blocks."""
    M = rng.standard_normal((m, m)) * (rng.random((m, m)) < min(1.0, 3.0 / max(m, 1)))
    M += np.diag(np.sign(rng.standard_normal(m)) * (2.0 + np.abs(M).sum(axis=1)))
    return M[:, rng.permutation(m)]


def _updates(rng, B, f, count):
    """Apply ``count`` well-conditioned column replacements to f (and B)."""
    m = B.shape[0]
    for _ in range(count):
        r = int(rng.integers(m))
        a = rng.standard_normal(m) * (rng.random(m) < 0.5)  # dense enough to exercise eta growth
        a[r] += 4.0 * np.sign(rng.standard_normal())
        trial = B.copy()
        trial[:, r] = a
        if np.linalg.cond(trial) > 1e5:
            continue
        f.update(r, f.ftran(a))
        B = trial
    return B


@pytest.mark.parametrize("m", [1, 2, 5, 33, 300])
def test_specialized_solves_match_dense_for_every_layout(m):
    rng = np.random.default_rng(m)
    B = _random_basis(rng, m)
    f = Factor(sp.csc_matrix(B))
    for k in range(1, 6):  # 1-3 take the one/pair kernels, 4-5 the general loop
        C = rng.standard_normal((m, k))
        ref = np.linalg.solve(B, C)  # reference: dense numpy solve
        for a in (C, np.asfortranarray(C), np.repeat(C, 2, axis=1)[:, ::2]):  # C, F and strided
            np.testing.assert_allclose(f.solve_block(a), ref, rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(f.ftran_many(a), ref, rtol=1e-10, atol=1e-12)
    a, b = rng.standard_normal(m), rng.standard_normal(m)
    ra, rb = np.linalg.solve(B, a), np.linalg.solve(B, b)
    both = np.column_stack([a, b])
    for x, y in ((a, b), (both[:, 0], both[:, 1]), (np.repeat(a, 2)[::2], b), (a, np.repeat(b, 3)[::3])):
        va, vb = f.ftran_pair(x, y)
        np.testing.assert_allclose(va, ra, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(vb, rb, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(f.ftran(x), ra, rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(a, both[:, 0])  # inputs are left alone


@pytest.mark.parametrize("seed", range(3))
def test_pair_ftran_after_eta_updates_and_through_bordered_layers(seed):
    rng = np.random.default_rng(700 + seed)
    m0 = 40
    B0 = _random_basis(rng, m0)
    base = Factor(sp.csc_matrix(B0))
    B0 = _updates(rng, B0, base, 12)  # the base carries etas (dense columns: the eta arrays grow)
    bordered: BorderedFactor | Factor = base
    B = B0
    for layer in range(2):
        extra = int(rng.integers(1, 6))
        C = sp.random(extra, B.shape[0], density=0.3, random_state=rng, format="csr")
        bordered = BorderedFactor(bordered, C)
        B = np.block([[B, np.zeros((B.shape[0], extra))], [C.toarray(), -np.eye(extra)]])
        B = _updates(rng, B, bordered, 3 + layer)  # etas on top of the bordered layer too
        a, b = rng.standard_normal(B.shape[0]), rng.standard_normal(B.shape[0])
        va, vb = bordered.ftran_pair(a, b)
        np.testing.assert_allclose(va, np.linalg.solve(B, a), rtol=1e-9, atol=1e-10)
        np.testing.assert_allclose(vb, np.linalg.solve(B, b), rtol=1e-9, atol=1e-10)
        three = bordered.ftran_many(np.column_stack([a, b, a - b]))
        np.testing.assert_allclose(
            three, np.linalg.solve(B, np.column_stack([a, b, a - b])), rtol=1e-9, atol=1e-10
        )


def test_kernels_on_empty_factors():
    empty = Factor(sp.csc_matrix((0, 0)))
    va, vb = empty.ftran_pair(np.zeros(0), np.zeros(0))
    assert va.shape == vb.shape == (0,)
    p0, i0 = np.zeros(1, np.int32), np.zeros(0, np.int32)
    lu = (p0, i0, np.zeros(0), p0, i0, np.zeros(0), np.zeros(0), np.zeros(0, np.int64), np.zeros(0, np.int64))
    out = np.zeros(0)
    kernels.lu_solve_one(*lu, np.zeros(0), out)  # m = 0: the "last column first" loop must not run
    kernels.lu_solve_pair(*lu, np.zeros(0), np.zeros(0), out, out.copy())
    assert kernels.lu_solve_t(*lu, np.zeros(0)).shape == (0,)


def test_eta_append_skips_the_pivot_row_and_zeros():
    a = np.array([0.0, 2.0, -1.0, 0.0, 3.0])
    idx, vals = np.full(8, -1, np.int64), np.zeros(8)
    end = kernels.eta_append(a, 1, idx, vals, 3)
    assert end == 5 and list(idx[3:5]) == [2, 4] and list(vals[3:5]) == [-1.0, 3.0]
    assert list(idx[:3]) == [-1, -1, -1] and idx[5] == -1  # nothing written outside [start, end)


# ------------------------------------------------------------------ whole dual solves
class _Watched(Simplex):
    """The simplex with each dual pivot's running dual infeasibility compared with a fresh sum."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.worst = 0.0
        self.dual_pivots = 0
        self.flips = 0
        self.nonzero_sums = 0

    def log(self, *args, **kwargs) -> None:
        if args[0] == "dual":
            running = args[8]  # (algorithm, p, bound, q, pivot, step, flips, pinf, dinf, objective)
            fresh = kernels.dual_infeasibility_sum(self.d, self.status)
            scale = 1.0 + float(np.abs(self.d[self.status != BASIC]).sum())
            self.worst = max(self.worst, abs(running - fresh) / scale)
            self.dual_pivots += 1
            self.flips += int(args[6])
            self.nonzero_sums += fresh > 0.0
            assert args[7] == pytest.approx(np.abs(self.primal_infeasibilities()).sum(), rel=1e-12, abs=1e-15)
            assert args[9] == float(self.cost_true @ self.x)
        super().log(*args, **kwargs)


def _planning_lp(seed: int, m: int = 22, n: int = 34) -> LinearProgram:
    """A random model with boxed, free and fixed columns, equality and ranged rows (so that dual
    pivots flip bounds, fixed logicals leave, and the slack basis is neither primal nor dual
    feasible)."""
    rng = np.random.default_rng(seed)
    A = rng.uniform(-2.0, 2.0, (m, n)) * (rng.random((m, n)) < 0.25)
    A[np.arange(m), rng.integers(0, n, m)] = rng.uniform(0.5, 2.0, m)
    lo = np.where(rng.random(n) < 0.15, -INF, 0.0)
    up = np.where(rng.random(n) < 0.6, rng.uniform(1.0, 5.0, n), INF)
    fixed = rng.random(n) < 0.08
    lo[fixed] = up[fixed] = np.where(np.isfinite(lo[fixed]), lo[fixed], 1.0)
    free = (rng.random(n) < 0.08) & ~fixed
    lo[free], up[free] = -INF, INF
    rl = rng.uniform(-3.0, 1.0, m)
    ru = rl + np.where(rng.random(m) < 0.3, 0.0, rng.uniform(0.0, 5.0, m))
    ru[rng.random(m) < 0.2] = INF
    return LinearProgram(A=sp.csc_matrix(A), c=rng.uniform(-3.0, 3.0, n), col_lower=lo, col_upper=up,
                         row_lower=rl, row_upper=ru)  # fmt: skip


@pytest.mark.parametrize("rule", ["steepest_edge", "dantzig", "smallest_index"])
@pytest.mark.parametrize("refactor_every", [2, 100])
def test_running_dual_infeasibility_and_optimum(rule, refactor_every):
    worst, pivots, flips, nonzero, compared = 0.0, 0, 0, 0, 0
    for seed in range(12):
        lp = _planning_lp(seed)
        # loose tolerances keep Harris's small infeasibilities nonzero, so the sums have something to track
        for tol in (1e-7, 1e-3):
            opts = SolveOptions(engine="builtin", fallback=False, dual_pricing=rule, refactor_every=refactor_every,
                                stall_limit=8, primal_tol=tol, dual_tol=tol)  # fmt: skip
            sim = _Watched(lp, slack_basis(lp), opts)
            out = sim.run()
            worst = max(worst, sim.worst)
            pivots += sim.dual_pivots
            flips += sim.flips
            nonzero += sim.nonzero_sums
            if tol == 1e-7:
                ref = solve(lp)  # reference solve: HiGHS via highspy
                assert out.status == ref.status
                if ref.status == "optimal":
                    assert lp.objective_value(out.x) == pytest.approx(ref.objective, rel=1e-7, abs=1e-7)
                compared += 1
    # the paths under review were exercised (the smallest-index rule never flips bounds)
    assert pivots > 200 and nonzero > 10 and (flips > 20 or rule == "smallest_index")
    assert worst <= 1e-12
    assert compared == 12


def test_dual_with_fixed_leaving_rows_and_bland():
    """Equality rows (fixed logicals leave as FIXED), a stall limit of 1 (perturbation, then the
    smallest-index rule) and refactorization after every pivot."""
    rng = np.random.default_rng(5)
    m, n = 15, 25
    A = rng.integers(0, 3, (m, n)).astype(float) * (rng.random((m, n)) < 0.3)
    A[np.arange(m), np.arange(m)] = 1.0
    x0 = rng.integers(0, 3, n).astype(float)
    b = A @ x0
    lp = LinearProgram(A=sp.csc_matrix(A), c=rng.integers(1, 4, n).astype(float), col_lower=np.zeros(n),
                       col_upper=np.full(n, 4.0), row_lower=b, row_upper=b)  # fmt: skip
    ref = solve(lp)  # reference solve: HiGHS via highspy
    for every in (1, 3):
        opts = SolveOptions(engine="builtin", fallback=False, refactor_every=every, stall_limit=1)
        sim = _Watched(lp, slack_basis(lp), opts)
        try:
            out = sim.run()
        except Exception as exc:  # a stall is an honest outcome at stall_limit=1; a wrong answer is not
            assert type(exc).__name__ == "NumericalTrouble" and "stalled" in str(exc)
            continue
        assert out.status == ref.status == "optimal"
        assert lp.objective_value(out.x) == pytest.approx(ref.objective, rel=1e-8)
        assert sim.worst <= 1e-12


# ------------------------------------------------------------------ no compile on a first request
_PROBE = r"""
import json, numba, numpy as np, scipy.sparse as sp
from service.lp import kernels, LinearProgram, SolveOptions, solve, reoptimize, slack_basis, remap
from service import plan_json
from service.serialize import solution_json
from service.store import Solution
kernels.warm_up(); plan_json.warm_up()
def sigs():
    return {f"{mod.__name__}.{k}": {str(s) for s in f.signatures} for mod in (kernels, plan_json)
            for k, f in vars(mod).items() if isinstance(f, numba.core.registry.CPUDispatcher)}
before = sigs()
INF = np.inf
for seed in range(6):
    rng = np.random.default_rng(seed)
    m, n = 14, 20
    A = rng.uniform(-2, 2, (m, n)) * (rng.random((m, n)) < 0.3)
    lp = LinearProgram(A=sp.csc_matrix(A), c=rng.uniform(-3, 3, n), col_lower=np.zeros(n),
                       col_upper=np.where(rng.random(n) < 0.6, 3.0, INF), row_lower=rng.uniform(-3, 1, m),
                       row_upper=np.where(rng.random(m) < 0.5, 2.0, INF))
    for rule in ("steepest_edge", "dantzig", "smallest_index"):
        res = solve(lp, SolveOptions(engine="builtin", fallback=False, dual_pricing=rule, refactor_every=3,
                                     ranging=True))
    res = solve(lp, SolveOptions(engine="builtin", fallback=False))
    if res.status != "optimal":
        continue
    # a cut through the optimum: rows appended, the old factorization wrapped (bordered pair FTRAN)
    cut = sp.csc_matrix(rng.uniform(0, 1, (2, n)))
    lp2 = LinearProgram(A=sp.vstack([lp.A, cut], format="csc"), c=lp.c, col_lower=lp.col_lower,
                        col_upper=lp.col_upper, row_lower=np.concatenate([lp.row_lower, [-INF, -INF]]),
                        row_upper=np.concatenate([lp.row_upper, cut @ res.x * 0.9]),
                        col_names=lp.col_names, row_names=lp.row_names + ["cut0", "cut1"])
    basis, _ = remap(res.basis, lp.col_names, lp.row_names, lp2)
    res2 = reoptimize(lp2, basis, SolveOptions(fallback=False), state=res.state)
    assert res2.status in ("optimal", "infeasible"), res2.status
    sol = Solution(res2.x, res2.row_activity, res2.shadow_price, res2.reduced_cost)
    for view in ("full", "nonzero"):
        solution_json(lp2, sol, res2.basis, view)
after = sigs()
print(json.dumps({k: sorted(after[k] - before.get(k, set())) for k in after if after[k] - before.get(k, set())}))
"""


def test_no_kernel_specialization_beyond_warm_up():
    """A fresh process that ran warm_up() must not compile (or load) another specialization on a
    typical mix of solves: cold dual/primal with every row rule, bound flips, refactorizations,
    ranging, a warm cut with the bordered factorization, and the plan encoder."""
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.run([sys.executable, "-c", _PROBE], cwd=REPO, env=env, capture_output=True, text=True,
                          timeout=300)  # fmt: skip
    assert proc.returncode == 0, proc.stderr[-3000:]
    new = json.loads(proc.stdout.strip().splitlines()[-1])
    assert new == {}
