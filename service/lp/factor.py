"""Basis factorization: sparse LU of B with product-form (eta) updates.

B is the m x m matrix of basic columns of the full matrix [A, -I]. After a
refactorization, B0 = P L U Q is held by SuperLU (scipy.sparse.linalg.splu).
Each basis change in row r with entering column alpha_q = B^-1 a_q appends an
eta record (r, alpha_q) so that B_new^-1 = E B^-1 with E the identity except
column r (product form of the inverse, Dantzig and Orchard-Hays 1954).

    FTRAN: solve B v = a      (apply B0^-1, then the etas in order)
    BTRAN: solve B^T h = e    (apply the etas transposed in reverse, then B0^-T)

``BorderedFactor`` reuses a finished factorization when rows are appended to
the model with their logicals basic (the common "add a constraint" change):

    B' = [[B, 0],
          [C, -I]]      C = the new rows restricted to B's basic columns

so B' v = a gives v1 = B^-1 a1, v2 = C v1 - a2, and B'^T h = e gives
h2 = -e2, h1 = B^-T (e1 + C^T e2). The base factorization is never modified,
so one cached factorization can serve several requests.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components, maximum_bipartite_matching
from scipy.sparse.linalg import splu

from . import kernels


class SingularBasis(RuntimeError):
    """The basis matrix is singular or too ill-conditioned to factorize."""


class _EtaFile:
    """Product-form updates on top of a base solver (``_solve``/``_solve_t``).

    The eta records live in flat arrays (row, pivot, start offsets, then the
    off-pivot entries of each record back to back) so that applying them is one
    compiled loop (kernels.eta_ftran / eta_btran) instead of a Python loop."""

    m: int

    def __init__(self) -> None:
        self._rows = np.empty(16, dtype=np.int64)
        self._pivots = np.empty(16)
        self._starts = np.zeros(17, dtype=np.int64)
        self._idx = np.empty(256, dtype=np.int64)
        self._vals = np.empty(256)
        self._count = 0

    @property
    def updates(self) -> int:
        """Updates applied since the last true factorization (base included)."""
        return self._count

    def _solve(self, a: np.ndarray) -> np.ndarray:  # B0^-1 a, a may be 2-D
        raise NotImplementedError

    def _solve_t(self, h: np.ndarray) -> np.ndarray:  # B0^-T h
        raise NotImplementedError

    def _solve_pair(self, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:  # B0^-1 a, B0^-1 b
        raise NotImplementedError

    def _apply_etas(self, v: np.ndarray) -> None:
        if self._count:
            kernels.eta_ftran(v, self._rows, self._pivots, self._starts, self._idx, self._vals, self._count)

    def ftran(self, a: np.ndarray) -> np.ndarray:
        if self.m == 0:
            return np.zeros(0)
        v = np.ascontiguousarray(self._solve(np.asarray(a, dtype=np.float64)))
        self._apply_etas(v.reshape(-1, 1))
        return v

    def ftran_many(self, cols: np.ndarray) -> np.ndarray:
        """FTRAN of several columns at once (one LU solve with k right-hand sides)."""
        if self.m == 0:
            return np.zeros((0, cols.shape[1]))
        v = self._solve(np.asarray(cols, dtype=np.float64))
        v = np.ascontiguousarray(v.reshape(-1, 1) if v.ndim == 1 else v)
        self._apply_etas(v)
        return v

    def ftran_pair(self, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """FTRAN of two columns (a dual pivot's entering column and its DSE
        vector) in one pass over the LU, as two vectors."""
        if self.m == 0:
            return np.zeros(0), np.zeros(0)
        va, vb = self._solve_pair(np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64))
        va, vb = np.ascontiguousarray(va), np.ascontiguousarray(vb)  # the etas update them in place
        self._apply_etas(va.reshape(-1, 1))
        self._apply_etas(vb.reshape(-1, 1))
        return va, vb

    def btran(self, h: np.ndarray) -> np.ndarray:
        if self.m == 0:
            return np.zeros(0)
        h = np.array(h, dtype=np.float64, copy=True)
        if self._count:
            kernels.eta_btran(h, self._rows, self._pivots, self._starts, self._idx, self._vals, self._count)
        return self._solve_t(h)

    def update(self, r: int, alpha_q: np.ndarray) -> None:
        """Record the basis change in row r with the FTRAN'd entering column."""
        k, start = self._count, int(self._starts[self._count])
        if k + 1 >= self._rows.size:  # grow the per-record arrays
            size = 2 * self._rows.size
            self._rows = np.resize(self._rows, size)
            self._pivots = np.resize(self._pivots, size)
            self._starts = np.resize(self._starts, size + 1)
        if start + alpha_q.size > self._idx.size:  # room for a dense column
            size = max(2 * self._idx.size, start + alpha_q.size)
            self._idx = np.resize(self._idx, size)
            self._vals = np.resize(self._vals, size)
        self._rows[k] = r
        self._pivots[k] = alpha_q[r]
        self._starts[k + 1] = kernels.eta_append(alpha_q, r, self._idx, self._vals, start)
        self._count = k + 1


class Factor(_EtaFile):
    """LU of B. Simplex bases of network-like models are nearly triangular, so
    B is first permuted to block triangular form (a zero-free diagonal from a
    maximum matching, then strongly connected components in topological
    order: Duff and Reid, 1978); when the diagonal blocks are small, SuperLU
    factorizes that form in its natural order with pivoting confined to the
    blocks, which keeps L and U almost as sparse as B. Otherwise (large
    irreducible blocks) SuperLU's COLAMD ordering is used on B itself."""

    FILL_ALLOWANCE = 10.0  # worst-case block fill, in multiples of nnz(B) (rule of thumb)

    def __init__(self, B: sp.csc_matrix) -> None:
        super().__init__()
        started = time.perf_counter()
        self.m = B.shape[0]
        self.depth = 0
        self.seconds = 0.0
        self.lu_nnz = 0
        self.row_perm = self.col_perm = None
        if self.m == 0:
            self.lu = None
            return
        B = sp.csc_matrix(B)
        M = self._block_triangular(B)
        try:
            if M is not None:
                self.lu = splu(M, permc_spec="NATURAL", options={"SymmetricMode": False})
            else:
                self.lu = splu(B, permc_spec="COLAMD", options={"SymmetricMode": False})
        except RuntimeError as exc:  # "Factor is exactly singular"
            raise SingularBasis(str(exc)) from exc
        L, U = self.lu.L, self.lu.U
        self.lu_nnz = int(L.nnz + U.nnz)
        udiag = U.diagonal()
        amax = np.abs(udiag)
        if amax.size and (amax.min() <= 1e-11 * max(1.0, amax.max()) or not np.isfinite(amax).all()):
            raise SingularBasis("basis matrix is numerically singular")
        # the factors as plain arrays for the compiled substitutions (kernels.lu_solve):
        # Pr M Pc = L U with M = B[row_perm][:, col_perm], folded into one gather
        # (src) before and one scatter (dst) after the triangular solves
        ident = np.arange(self.m)
        row_perm = self.row_perm if self.row_perm is not None else ident
        col_perm = self.col_perm if self.col_perm is not None else ident
        self._src = np.empty(self.m, dtype=np.int64)
        self._src[self.lu.perm_r] = row_perm
        self._dst = np.empty(self.m, dtype=np.int64)
        self._dst[self.lu.perm_c] = col_perm
        # 32-bit positions: a third less to read per substitution than 64-bit (64-bit beyond 2^31)
        ints = np.int32 if max(L.nnz, U.nnz, self.m) < 2**31 - 1 else np.int64
        self._L = (L.indptr.astype(ints), L.indices.astype(ints), L.data.astype(np.float64))
        self._U = (U.indptr.astype(ints), U.indices.astype(ints), U.data.astype(np.float64))
        self._Ud = np.ascontiguousarray(udiag, dtype=np.float64)
        self.lu = None  # everything needed is above; SuperLU's copy would double the memory
        self.seconds = time.perf_counter() - started  # what a refactorization costs here

    def _block_triangular(self, B: sp.csc_matrix) -> sp.csc_matrix | None:
        if (B.data == 0).any():
            B = B.copy()
            B.eliminate_zeros()
        csr = B.tocsr()
        match = maximum_bipartite_matching(csr, perm_type="column")
        if (match < 0).any():
            raise SingularBasis("basis matrix is structurally singular")
        # the graph of B with its columns in matched order (column match[i] at position i)
        at = np.empty(match.size, dtype=np.int64)
        at[match] = np.arange(match.size)
        matched = sp.csr_matrix((csr.data, at[csr.indices], csr.indptr), shape=csr.shape)
        _, labels = connected_components(matched, directed=True, connection="strong")
        sizes = np.bincount(labels).astype(np.float64)
        # natural order inside a block can fill it completely: accept the
        # triangular path while that worst case stays near the size of B
        if (sizes[sizes > 1] ** 2).sum() > self.FILL_ALLOWANCE * max(csr.nnz, 1):
            return None
        # scipy numbers strong components in reverse topological order; sorting
        # by -label puts B in block upper triangular form, so partial pivoting
        # only ever looks inside a diagonal block
        perm = np.argsort(-labels, kind="stable")
        self.row_perm = perm
        self.col_perm = match[perm].astype(np.int64)
        ptr, idx, val = kernels.permute_csc(B.indptr, B.indices, B.data, perm.astype(np.int64), self.col_perm)
        return sp.csc_matrix((val, idx, ptr), shape=B.shape)

    def solve_block(self, a: np.ndarray) -> np.ndarray:
        """B0^-1 a for a block of columns (no eta updates: a fresh factorization)."""
        return self._solve(np.asarray(a, dtype=np.float64))

    def solve_block_t(self, h: np.ndarray) -> np.ndarray:
        """B0^-T h for a block of columns."""
        return self._solve_t(np.asarray(h, dtype=np.float64))

    def _solve(self, a: np.ndarray) -> np.ndarray:
        lu = (*self._L, *self._U, self._Ud, self._src, self._dst)
        if a.ndim == 1:
            v = np.empty(a.shape[0])
            kernels.lu_solve_one(*lu, a, v)
            return v
        k = a.shape[1]
        if k > 3:  # many right-hand sides: the general loop
            return kernels.lu_solve(*lu, np.ascontiguousarray(a))
        # one to three (a simplex pivot's FTRAN): the specialized kernels, in pairs
        v = np.empty(a.shape)
        for c in range(0, k - 1, 2):
            kernels.lu_solve_pair(*lu, a[:, c], a[:, c + 1], v[:, c], v[:, c + 1])
        if k % 2:
            kernels.lu_solve_one(*lu, a[:, k - 1], v[:, k - 1])
        return v

    def _solve_pair(self, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        va, vb = np.empty(self.m), np.empty(self.m)
        kernels.lu_solve_pair(*self._L, *self._U, self._Ud, self._src, self._dst, a, b, va, vb)
        return va, vb

    def _solve_t(self, h: np.ndarray) -> np.ndarray:
        if h.ndim == 2:
            return np.column_stack([self._solve_t(np.ascontiguousarray(col)) for col in h.T])
        return kernels.lu_solve_t(*self._L, *self._U, self._Ud, self._src, self._dst, h)


class BorderedFactor(_EtaFile):
    """A finished factorization extended by appended rows with basic logicals."""

    def __init__(self, base: _EtaFile, C: sp.spmatrix) -> None:
        super().__init__()
        self.base = base
        self.C = C.tocsr()
        self.CT = C.T.tocsr()  # no copy when C comes as a CSC
        self.m0 = base.m
        self.m = base.m + self.C.shape[0]
        self.depth = getattr(base, "depth", 0) + 1
        self.seconds = getattr(base, "seconds", 0.0)
        self.lu_nnz = getattr(base, "lu_nnz", 0)

    @property
    def updates(self) -> int:
        return self.base.updates + self._count

    def _solve(self, a: np.ndarray) -> np.ndarray:
        m0 = self.m0
        if a.ndim == 1:
            v1 = self.base.ftran(a[:m0])
            return np.concatenate([v1, self.C @ v1 - a[m0:]])
        v1 = self.base.ftran_many(a[:m0])
        return np.vstack([v1, self.C @ v1 - a[m0:]])

    def _solve_pair(self, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        m0 = self.m0
        va, vb = self.base.ftran_pair(a[:m0], b[:m0])
        return np.concatenate([va, self.C @ va - a[m0:]]), np.concatenate([vb, self.C @ vb - b[m0:]])

    def _solve_t(self, h: np.ndarray) -> np.ndarray:
        m0 = self.m0
        h2 = h[m0:]
        h1 = self.base.btran(h[:m0] + self.CT @ h2)
        return np.concatenate([h1, -h2])
