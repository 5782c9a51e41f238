"""Basis factorization: sparse LU of B with product-form (eta) updates.

B is the m x m matrix of basic columns of the full matrix [A, -I]. After a
refactorization, B0 = P L U Q is held by SuperLU (scipy.sparse.linalg.splu).
Each basis change in row r with entering column alpha_q = B^-1 a_q appends an
eta record (r, alpha_q) so that B_new^-1 = E B^-1 with E the identity except
column r (product form of the inverse, Dantzig and Orchard-Hays 1954).

    FTRAN: solve B v = a      (apply B0^-1, then the etas in order)
    BTRAN: solve B^T h = e    (apply the etas transposed in reverse, then B0^-T)
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu


class SingularBasis(RuntimeError):
    """The basis matrix is singular or too ill-conditioned to factorize."""


class Factor:
    def __init__(self, B: sp.csc_matrix) -> None:
        self.m = B.shape[0]
        self.etas: list[tuple[int, np.ndarray, np.ndarray, float]] = []
        if self.m == 0:
            self.lu = None
            return
        try:
            self.lu = splu(
                sp.csc_matrix(B),
                permc_spec="COLAMD",
                options={"SymmetricMode": False},
            )
        except RuntimeError as exc:  # "Factor is exactly singular"
            raise SingularBasis(str(exc)) from exc
        udiag = np.abs(self.lu.U.diagonal())
        if udiag.size and (udiag.min() <= 1e-11 * max(1.0, udiag.max()) or not np.isfinite(udiag).all()):
            raise SingularBasis("basis matrix is numerically singular")

    @property
    def updates(self) -> int:
        return len(self.etas)

    def ftran(self, a: np.ndarray) -> np.ndarray:
        if self.m == 0:
            return np.zeros(0)
        v = self.lu.solve(np.asarray(a, dtype=np.float64))
        for r, idx, vals, piv in self.etas:
            vr = v[r]
            if vr != 0.0:
                vr = vr / piv
                v[idx] -= vals * vr
                v[r] = vr
        return v

    def ftran_many(self, cols: np.ndarray) -> np.ndarray:
        """FTRAN of several columns at once (one LU solve with k right-hand sides)."""
        if self.m == 0:
            return np.zeros((0, cols.shape[1]))
        v = self.lu.solve(np.asfortranarray(cols, dtype=np.float64))
        if v.ndim == 1:
            v = v.reshape(-1, 1)
        for r, idx, vals, piv in self.etas:
            vr = v[r] / piv
            if vr.any():
                v[idx] -= np.outer(vals, vr)
                v[r] = vr
        return v

    def btran(self, h: np.ndarray) -> np.ndarray:
        if self.m == 0:
            return np.zeros(0)
        h = np.array(h, dtype=np.float64, copy=True)
        for r, idx, vals, piv in reversed(self.etas):
            h[r] = (h[r] - vals @ h[idx]) / piv
        return self.lu.solve(h, trans="T")

    def update(self, r: int, alpha_q: np.ndarray) -> None:
        """Record the basis change in row r with the FTRAN'd entering column."""
        nz = np.flatnonzero(alpha_q)
        nz = nz[nz != r]
        self.etas.append((r, nz, alpha_q[nz].copy(), float(alpha_q[r])))
