"""The engine's model: a linear program in computational form.

    minimize / maximize   c @ x + offset
    subject to            row_lower <= A @ x <= row_upper
                          col_lower <=   x   <= col_upper

A is scipy.sparse CSC (m x n). Infinite bounds are +-numpy.inf; a row with
row_lower == row_upper is an equality, a row with both sides infinite is free.
Names are kept alongside so results can be reported in the user's terms.

This module holds data only; no solver logic lives here.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

MINIMIZE = 1
MAXIMIZE = -1


class ModelError(ValueError):
    """The arrays do not describe a valid linear program."""


@dataclass
class LinearProgram:
    A: sp.csc_matrix
    c: np.ndarray
    col_lower: np.ndarray
    col_upper: np.ndarray
    row_lower: np.ndarray
    row_upper: np.ndarray
    sense: int = MINIMIZE
    offset: float = 0.0
    col_names: list[str] = field(default_factory=list)
    row_names: list[str] = field(default_factory=list)
    name: str = ""

    def __post_init__(self) -> None:
        self.A = sp.csc_matrix(self.A, dtype=np.float64)
        self.A.sum_duplicates()
        self.A.sort_indices()
        self.c = np.asarray(self.c, dtype=np.float64).reshape(-1)
        self.col_lower = np.asarray(self.col_lower, dtype=np.float64).reshape(-1)
        self.col_upper = np.asarray(self.col_upper, dtype=np.float64).reshape(-1)
        self.row_lower = np.asarray(self.row_lower, dtype=np.float64).reshape(-1)
        self.row_upper = np.asarray(self.row_upper, dtype=np.float64).reshape(-1)
        if not self.col_names:
            self.col_names = [f"x{j}" for j in range(self.n)]
        if not self.row_names:
            self.row_names = [f"r{i}" for i in range(self.m)]
        self.validate()

    @property
    def m(self) -> int:
        return self.A.shape[0]

    @property
    def n(self) -> int:
        return self.A.shape[1]

    def validate(self) -> None:
        m, n = self.A.shape
        for label, arr, size in (
            ("c", self.c, n),
            ("col_lower", self.col_lower, n),
            ("col_upper", self.col_upper, n),
            ("row_lower", self.row_lower, m),
            ("row_upper", self.row_upper, m),
        ):
            if arr.shape != (size,):
                raise ModelError(f"{label} has shape {arr.shape}, expected ({size},)")
            if np.isnan(arr).any():
                raise ModelError(f"{label} contains NaN")
        if not np.isfinite(self.c).all():
            raise ModelError("costs must be finite")
        if not np.isfinite(self.A.data).all():
            raise ModelError("matrix coefficients must be finite")
        if self.sense not in (MINIMIZE, MAXIMIZE):
            raise ModelError("sense must be 1 (minimize) or -1 (maximize)")
        if len(self.col_names) != n or len(self.row_names) != m:
            raise ModelError("one name per column and per row is required")
        if (self.col_lower == np.inf).any() or (self.col_upper == -np.inf).any():
            raise ModelError("a column bound is infinite on the wrong side")
        if (self.row_lower == np.inf).any() or (self.row_upper == -np.inf).any():
            raise ModelError("a row bound is infinite on the wrong side")

    def copy(self) -> "LinearProgram":
        return LinearProgram(
            A=self.A.copy(),
            c=self.c.copy(),
            col_lower=self.col_lower.copy(),
            col_upper=self.col_upper.copy(),
            row_lower=self.row_lower.copy(),
            row_upper=self.row_upper.copy(),
            sense=self.sense,
            offset=self.offset,
            col_names=list(self.col_names),
            row_names=list(self.row_names),
            name=self.name,
        )

    def objective_value(self, x: np.ndarray) -> float:
        """Objective in the user's sense (no sign flip for maximization)."""
        return float(self.c @ x + self.offset)

    def trivially_inconsistent_bounds(self) -> list[str]:
        """Names of columns/rows whose lower bound exceeds the upper bound."""
        bad = [self.col_names[j] for j in np.flatnonzero(self.col_lower > self.col_upper)]
        bad += [self.row_names[i] for i in np.flatnonzero(self.row_lower > self.row_upper)]
        return bad


def rows_appended(A: sp.csc_matrix, old: sp.csc_matrix, bitwise: bool = False) -> bool:
    """True when ``A`` is ``old`` with rows appended below (both CSC with sorted indices, as every
    LinearProgram holds its matrix): the first rows of A hold exactly old's entries. ``bitwise``
    compares the values bit for bit (-0.0 is not 0.0), for callers that reuse stored bytes."""
    m0 = old.shape[0]
    if old.shape[1] != A.shape[1] or A.shape[0] < m0 or not (A.has_sorted_indices and old.has_sorted_indices):
        return False
    top = A.indices < m0
    counted = np.concatenate([[0], np.cumsum(top)])
    if not np.array_equal(counted[A.indptr[1:]] - counted[A.indptr[:-1]], np.diff(old.indptr)):
        return False
    if not np.array_equal(A.indices[top], old.indices):
        return False
    values, old_values = A.data[top], old.data
    if bitwise:
        values, old_values = values.view(np.int64), old_values.view(np.int64)
    return bool(np.array_equal(values, old_values))
