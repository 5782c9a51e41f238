"""Reusing the previous solve's factorization across a chain of changes.

Reference: a cold HiGHS solve (via highspy) of every changed model.
"""

from __future__ import annotations

import zlib

import numpy as np
import pytest

from service.lp import SolveOptions, remap, reoptimize, solve
from service.lp.mps import read_mps
from service.lp.simplex import Simplex
from tests.lp.changes import changed_costs, one_cut, profitable_column, tighter_bound_and_moved_rhs
from tests.lp.netlib import netlib_problems

PROBLEMS = netlib_problems()
CHAIN = [one_cut, one_cut, changed_costs, one_cut, tighter_bound_and_moved_rhs]


def _reused(res, reason: str = "cached_factorization") -> bool:
    return any(e.get("event") == "reuse" and e.get("reason") == reason for e in res.pivot_log)


@pytest.mark.parametrize("problem", PROBLEMS, ids=[p.name for p in PROBLEMS])
def test_chain_of_changes_with_reused_factorization(problem):
    lp = read_mps(problem.path)
    cold = solve(lp, SolveOptions(engine="builtin"))
    # re-solving from the optimal basis takes no pivot and leaves a fresh factorization
    res = reoptimize(lp, cold.basis, SolveOptions())
    assert res.pivots == 0
    rng = np.random.default_rng(zlib.crc32(problem.name.encode()))
    current = lp
    reused = []
    for change in CHAIN:
        changed = change(current, res, rng)
        basis, _ = remap(res.basis, current.col_names, current.row_names, changed)
        out = reoptimize(changed, basis, SolveOptions(), state=res.state)
        ref = solve(changed)  # reference: cold HiGHS
        assert out.fallback is None
        assert out.status == ref.status
        assert out.check["passed"]
        reused.append(_reused(out))
        if out.status != "optimal":
            break
        assert abs(out.objective - ref.objective) <= 1e-6 * max(1.0, abs(ref.objective))
        current, res = changed, out
    assert reused[0]  # a fresh factorization is always reused for an added row


def test_reuse_is_refused_when_the_matrix_changed():
    problem = next(p for p in PROBLEMS if p.name == "afiro")
    lp = read_mps(problem.path)
    res = solve(lp, SolveOptions(engine="builtin"))
    changed = lp.copy()
    changed.A = changed.A.copy()
    changed.A.data[0] *= 1.5  # a coefficient moved: the old LU no longer describes B
    assert not Simplex.reuse_applies(changed, res.basis, res.state, SolveOptions())
    out = reoptimize(changed, res.basis, SolveOptions(), state=res.state)
    assert not _reused(out)
    ref = solve(changed)
    assert out.status == ref.status
    if ref.status == "optimal":
        assert abs(out.objective - ref.objective) <= 1e-6 * max(1.0, abs(ref.objective))


def test_scaling_is_kept_when_only_the_factorization_is_too_old(monkeypatch):
    """An appended row on a state whose factorization may not be wrapped again: the
    scaling is still reused (event reason cached_scaling), the LU is fresh, and the
    answer equals a cold HiGHS solve of the changed model (the reference)."""
    import service.lp.simplex as simplex_module

    problem = next(p for p in PROBLEMS if p.name == "sc105")
    lp = read_mps(problem.path)
    res = solve(lp, SolveOptions(engine="builtin"))
    changed = one_cut(lp, res, np.random.default_rng(5))
    basis, _ = remap(res.basis, lp.col_names, lp.row_names, changed)
    monkeypatch.setattr(simplex_module, "MAX_REUSE_DEPTH", 0)  # every factorization counts as too deep
    assert not Simplex.reuse_applies(changed, basis, res.state, SolveOptions())
    assert Simplex.only_rows_appended(changed, res.state)
    out = reoptimize(changed, basis, SolveOptions(), state=res.state)
    assert _reused(out, "cached_scaling") and not _reused(out)
    ref = solve(changed)
    assert out.status == ref.status and out.fallback is None and out.check["passed"]
    if ref.status == "optimal":
        assert abs(out.objective - ref.objective) <= 1e-6 * max(1.0, abs(ref.objective))


def test_reuse_is_refused_when_columns_were_added():
    problem = next(p for p in PROBLEMS if p.name == "sc50a")
    lp = read_mps(problem.path)
    res = solve(lp, SolveOptions(engine="builtin"))
    changed = profitable_column(lp, res, np.random.default_rng(1))
    basis, _ = remap(res.basis, lp.col_names, lp.row_names, changed)
    assert not Simplex.reuse_applies(changed, basis, res.state, SolveOptions())


@pytest.mark.parametrize("name", ["afiro", "sc105", "scfxm1", "israel"])
def test_warm_state_after_a_cold_highs_solve(name):
    """HiGHS returns no factorization; warm_state builds one so the first change reuses it."""
    from service.lp import warm_state

    problem = next(p for p in PROBLEMS if p.name == name)
    lp = read_mps(problem.path)
    cold = solve(lp)  # HiGHS
    assert cold.state is None
    state = warm_state(lp, cold.basis)
    assert state is not None
    changed = one_cut(lp, cold, np.random.default_rng(zlib.crc32(name.encode())))
    basis, _ = remap(cold.basis, lp.col_names, lp.row_names, changed)
    out = reoptimize(changed, basis, SolveOptions(), state=state)
    ref = solve(changed)  # reference: cold HiGHS
    assert _reused(out)
    assert out.status == ref.status
    if ref.status == "optimal":
        assert abs(out.objective - ref.objective) <= 1e-6 * max(1.0, abs(ref.objective))


def _small(m0: int, c: np.ndarray):
    from service.lp import LinearProgram

    n = c.size
    A = np.array([[1.0, 2.0, 0.0, 1.0], [0.0, 1.0, 1.0, 0.0]])[:m0]
    return LinearProgram(A=A, c=c, col_lower=np.zeros(n), col_upper=np.full(n, 5.0),
                         row_lower=np.full(m0, -np.inf), row_upper=np.full(m0, 4.0))  # fmt: skip


@pytest.mark.parametrize(
    "m0, c",
    [(0, [1.0, -1.0, 2.0, -2.0]), (2, [1.0, 1.0, 1.0, 1.0]), (2, [-1.0, -1.0, -1.0, -1.0])],
    ids=["no-rows-before", "only-logicals-basic", "structurals-basic"],
)
def test_bordered_reuse_with_several_rows_one_of_them_empty(m0, c):
    """Three rows appended at once (one without entries) onto a model with no rows, a basis of
    logicals only, or structurals in the basis: the wrapped factorization solves with the exact
    basis matrix, and the answer equals a cold HiGHS solve (the reference)."""
    from tests.lp.changes import add_rows

    lp = _small(m0, np.array(c))
    res = solve(lp, SolveOptions(engine="builtin"))
    rows = [(np.array([1.0, 1.0, 0.0, 1.0]), -np.inf, 3.0), (np.zeros(4), -1.0, 1.0),
            (np.array([1.0, 0.0, 1.0, 0.0]), -np.inf, 2.0)]  # fmt: skip
    changed = add_rows(lp, rows)
    basis, _ = remap(res.basis, lp.col_names, lp.row_names, changed)
    sim = Simplex(changed, basis, SolveOptions(), state=res.state)
    assert sim.reused
    B = sim._basis_matrix(sim.basic_idx).toarray()
    rng = np.random.default_rng(3)
    a = rng.standard_normal(changed.m)
    assert sim.factor.ftran(a) == pytest.approx(np.linalg.solve(B, a), abs=1e-12)
    assert sim.factor.btran(a) == pytest.approx(np.linalg.solve(B.T, a), abs=1e-12)
    out = reoptimize(changed, basis, SolveOptions(), state=res.state)
    ref = solve(changed)
    assert _reused(out) and out.status == ref.status == "optimal" and out.check["passed"]
    assert out.objective == pytest.approx(ref.objective, abs=1e-9)


def test_an_explicit_zero_in_an_appended_row_does_not_set_its_scale():
    """Scaling an appended row with the kept column scales skips stored zeros, as compute_scaling
    does for the whole matrix: the same row with and without an explicit 0.0 gets the same scale
    (a zero once counted as 2^-996 and scaled the row by about 2^498)."""
    import scipy.sparse as sp

    from tests.lp.changes import add_rows

    lp = _small(2, np.array([-1.0, -1.0, -1.0, -1.0]))
    res = solve(lp, SolveOptions(engine="builtin"))
    changed = add_rows(lp, [(np.array([1.0, 0.0, 3.0, 0.0]), -np.inf, 3.0)])
    with_zero = changed.copy()
    A = changed.A.tocoo()
    with_zero.A = sp.csc_matrix(  # the same matrix plus a stored 0.0 in the new row
        (np.append(A.data, 0.0), (np.append(A.row, changed.m - 1), np.append(A.col, 1))), shape=A.shape
    )
    assert with_zero.A.nnz == changed.A.nnz + 1
    scales = []
    for model in (changed, with_zero):
        basis, _ = remap(res.basis, lp.col_names, lp.row_names, model)
        sim = Simplex(model, basis, SolveOptions(), state=res.state)
        assert sim.reused
        scales.append(sim.sc.row[-1])
    assert scales[0] == scales[1]
    out = reoptimize(with_zero, remap(res.basis, lp.col_names, lp.row_names, with_zero)[0], SolveOptions(),
                     state=res.state)  # fmt: skip
    assert out.objective == pytest.approx(solve(changed).objective, abs=1e-9)  # reference: cold HiGHS
