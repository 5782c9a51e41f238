"""Compiled kernels that assemble matrices, checked against scipy's own indexing on random inputs."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from service.lp import kernels


@pytest.mark.parametrize("seed", range(20))
def test_basis_csc_is_the_basic_columns_of_a_with_minus_identity(seed):
    rng = np.random.default_rng(seed)
    m, n = int(rng.integers(1, 40)), int(rng.integers(1, 60))
    A = sp.random(m, n, density=0.2, random_state=rng, format="csc")
    A.sort_indices()
    bcols = rng.choice(n + m, size=m, replace=False).astype(np.int64)
    ptr, idx, val = kernels.basis_csc(A.indptr, A.indices, A.data, n, bcols)
    B = sp.csc_matrix((val, idx, ptr), shape=(m, m))
    expected = sp.hstack([A, -sp.identity(m, format="csc")], format="csc")[:, bcols]
    np.testing.assert_array_equal(B.toarray(), expected.toarray())
    assert B.has_sorted_indices


@pytest.mark.parametrize("seed", range(20))
def test_permute_csc_matches_scipy_fancy_indexing(seed):
    rng = np.random.default_rng(100 + seed)
    m = int(rng.integers(1, 50))
    B = sp.random(m, m, density=0.15, random_state=rng, format="csc") + sp.identity(m, format="csc")
    B = sp.csc_matrix(B)
    B.sort_indices()
    rows, cols = rng.permutation(m).astype(np.int64), rng.permutation(m).astype(np.int64)
    ptr, idx, val = kernels.permute_csc(B.indptr, B.indices, B.data, rows, cols)
    M = sp.csc_matrix((val, idx, ptr), shape=(m, m))
    expected = sp.csc_matrix(B.tocsr()[rows][:, cols])
    expected.sort_indices()
    np.testing.assert_array_equal(M.indptr, expected.indptr)
    np.testing.assert_array_equal(M.indices, expected.indices)
    np.testing.assert_array_equal(M.data, expected.data)
