"""Basis factorization (service/lp/factor.py): FTRAN/BTRAN after eta updates, singular bases.

Reference for every solve: a dense solve with numpy.linalg.solve of the explicitly updated
basis matrix (the basis matrix after the same column replacements, built column by column).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from service.lp.factor import Factor, SingularBasis


def _well_conditioned(rng: np.random.Generator, m: int, density: float = 0.3) -> np.ndarray:
    """Sparse-ish random matrix with a dominant diagonal (condition number stays modest)."""
    M = rng.standard_normal((m, m)) * (rng.random((m, m)) < density)
    M += np.diag(np.sign(rng.standard_normal(m)) * (2.0 + np.abs(M).sum(axis=1)))
    return M


def _replace_sequence(rng: np.random.Generator, B: np.ndarray, updates: int):
    """Yield (r, new_column) pairs that keep B well conditioned (the pivot is not tiny)."""
    B = B.copy()
    for _ in range(updates):
        for _attempt in range(50):
            r = int(rng.integers(B.shape[0]))
            a = rng.standard_normal(B.shape[0]) * (rng.random(B.shape[0]) < 0.4)
            a[r] += 3.0 * np.sign(rng.standard_normal())
            trial = B.copy()
            trial[:, r] = a
            if np.linalg.cond(trial) < 1e4:
                B = trial
                yield r, a, B
                break


def _check_solves(f: Factor, B: np.ndarray, rng: np.random.Generator) -> None:
    m = B.shape[0]
    for _ in range(3):
        rhs = rng.standard_normal(m)
        # reference: dense numpy solves of the updated matrix
        assert f.ftran(rhs) == pytest.approx(np.linalg.solve(B, rhs), rel=1e-9, abs=1e-9)
        assert f.btran(rhs) == pytest.approx(np.linalg.solve(B.T, rhs), rel=1e-9, abs=1e-9)
    # unit vectors are what the simplex passes to BTRAN
    r = int(rng.integers(m))
    e = np.zeros(m)
    e[r] = 1.0
    assert f.btran(e) == pytest.approx(np.linalg.inv(B)[r], rel=1e-9, abs=1e-9)


@pytest.mark.parametrize("m", [1, 2, 7, 40])
@pytest.mark.parametrize("seed", range(4))
def test_ftran_btran_match_dense_after_eta_updates(m, seed):
    rng = np.random.default_rng(1000 * m + seed)
    B = _well_conditioned(rng, m)
    f = Factor(sp.csc_matrix(B))
    _check_solves(f, B, rng)
    count = 0
    for r, a, B_new in _replace_sequence(rng, B, updates=min(3 * m, 30)):
        alpha = f.ftran(a)  # the simplex hands over the FTRAN'd entering column
        f.update(r, alpha)
        count += 1
        assert f.updates == count
        _check_solves(f, B_new, rng)
        B = B_new
    assert count > 0


def test_ftran_does_not_modify_its_argument():
    rng = np.random.default_rng(5)
    B = _well_conditioned(rng, 6)
    f = Factor(sp.csc_matrix(B))
    a = rng.standard_normal(6)
    f.update(2, f.ftran(a + 3.0 * np.eye(6)[2]))
    rhs = rng.standard_normal(6)
    keep = rhs.copy()
    f.ftran(rhs)
    f.btran(rhs)
    assert np.array_equal(rhs, keep)


def test_update_with_unit_alpha_is_identity_on_solves():
    """Replacing column r by itself (alpha = e_r) leaves B^-1 unchanged."""
    rng = np.random.default_rng(9)
    B = _well_conditioned(rng, 5)
    f = Factor(sp.csc_matrix(B))
    f.update(3, np.eye(5)[3])
    _check_solves(f, B, rng)


def test_exactly_singular_basis_raises():
    B = np.array([[1.0, 2.0, 0.0], [2.0, 4.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(SingularBasis):
        Factor(sp.csc_matrix(B))


def test_duplicate_columns_raise():
    rng = np.random.default_rng(3)
    B = _well_conditioned(rng, 6)
    B[:, 4] = B[:, 1]
    with pytest.raises(SingularBasis):
        Factor(sp.csc_matrix(B))


def test_structurally_singular_basis_raises():
    """An empty column: singular by structure, whatever the values."""
    B = sp.csc_matrix(np.array([[1.0, 0.0], [3.0, 0.0]]))
    with pytest.raises(SingularBasis):
        Factor(B)


@pytest.mark.parametrize("eps", [1e-13, 1e-15])
def test_numerically_singular_basis_raises(eps):
    """Column 2 equals column 0 up to eps: singular to working precision."""
    B = np.array([[1.0, 0.0, 1.0], [0.0, 1.0, 0.0], [1.0, 0.0, 1.0 + eps]])
    with pytest.raises(SingularBasis):
        Factor(sp.csc_matrix(B))


def test_ill_conditioned_but_regular_basis_factorizes():
    """Condition about 1e6: nowhere near singular, must be accepted and solved accurately."""
    B = np.array([[1.0, 0.0, 1.0], [0.0, 1.0, 0.0], [1.0, 0.0, 1.0 + 1e-6]])
    f = Factor(sp.csc_matrix(B))
    rhs = np.array([1.0, 2.0, 3.0])
    assert f.ftran(rhs) == pytest.approx(np.linalg.solve(B, rhs), rel=1e-8)


def test_empty_basis():
    f = Factor(sp.csc_matrix((0, 0)))
    assert f.ftran(np.zeros(0)).shape == (0,)
    assert f.btran(np.zeros(0)).shape == (0,)
    assert f.updates == 0


def test_negative_identity_slack_basis():
    """The all-logical basis is -I: B^-1 = -I."""
    f = Factor(-sp.identity(4, format="csc"))
    v = np.array([1.0, -2.0, 3.0, 0.5])
    assert f.ftran(v) == pytest.approx(-v)
    assert f.btran(v) == pytest.approx(-v)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), m=st.integers(1, 12), updates=st.integers(1, 15))
def test_property_eta_chain_matches_dense(seed, m, updates):
    rng = np.random.default_rng(seed)
    B = _well_conditioned(rng, m, density=0.5)
    f = Factor(sp.csc_matrix(B))
    for r, a, B_new in _replace_sequence(rng, B, updates):
        f.update(r, f.ftran(a))
        B = B_new
    rhs = rng.standard_normal(m)
    # reference: dense numpy solves
    assert np.allclose(f.ftran(rhs), np.linalg.solve(B, rhs), rtol=1e-8, atol=1e-8)
    assert np.allclose(f.btran(rhs), np.linalg.solve(B.T, rhs), rtol=1e-8, atol=1e-8)
