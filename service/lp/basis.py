"""Simplex basis: one status per column and per row (the row's logical).

Statuses (trade terms): basic, at_lower, at_upper, fixed (nonbasic with
lower == upper), free (nonbasic free variable held at zero). A valid basis
has exactly m basic entries among the n + m columns and logicals.

Binary encoding (for Redis): a 12-byte header ``b"HBB1" + uint32 n + uint32 m``
followed by n + m int8 statuses. No pickle anywhere.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from enum import IntEnum

import numpy as np

from .model import LinearProgram


class Status(IntEnum):
    BASIC = 0
    AT_LOWER = 1
    AT_UPPER = 2
    FIXED = 3
    FREE = 4


STATUS_NAMES = {s: s.name.lower() for s in Status}
STATUS_BY_NAME = {v: k for k, v in STATUS_NAMES.items()}

_MAGIC = b"HBB1"
_HEADER = struct.Struct("<4sII")


class BasisError(ValueError):
    """A basis that cannot be decoded or does not fit its model."""


@dataclass
class Basis:
    col_status: np.ndarray  # int8, length n
    row_status: np.ndarray  # int8, length m (status of the row's logical)

    def __post_init__(self) -> None:
        self.col_status = np.asarray(self.col_status, dtype=np.int8).reshape(-1)
        self.row_status = np.asarray(self.row_status, dtype=np.int8).reshape(-1)

    @property
    def n(self) -> int:
        return self.col_status.size

    @property
    def m(self) -> int:
        return self.row_status.size

    def copy(self) -> "Basis":
        return Basis(self.col_status.copy(), self.row_status.copy())

    def basic_count(self) -> int:
        return int((self.col_status == Status.BASIC).sum() + (self.row_status == Status.BASIC).sum())

    def to_bytes(self) -> bytes:
        return _HEADER.pack(_MAGIC, self.n, self.m) + self.col_status.tobytes() + self.row_status.tobytes()

    @classmethod
    def from_bytes(cls, data: bytes) -> "Basis":
        if len(data) < _HEADER.size:
            raise BasisError("basis record too short")
        magic, n, m = _HEADER.unpack_from(data)
        if magic != _MAGIC:
            raise BasisError("not a basis record")
        body = np.frombuffer(data, dtype=np.int8, offset=_HEADER.size)
        if body.size != n + m:
            raise BasisError(f"basis record holds {body.size} statuses, header says {n + m}")
        if body.size and (body.min() < 0 or body.max() > max(Status)):
            raise BasisError("basis record holds an unknown status code")
        return cls(body[:n].copy(), body[n:].copy())

    def names(self) -> tuple[list[str], list[str]]:
        """Statuses as their names, columns then rows."""
        lookup = np.array([STATUS_NAMES[s] for s in Status], dtype=object)
        return list(lookup[self.col_status]), list(lookup[self.row_status])


def nonbasic_status(lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """The natural nonbasic status for each variable from its bounds alone."""
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    st = np.full(lower.shape, Status.FREE, dtype=np.int8)
    st[np.isfinite(upper)] = Status.AT_UPPER
    st[np.isfinite(lower)] = Status.AT_LOWER
    st[lower == upper] = Status.FIXED
    return st


def slack_basis(lp: LinearProgram) -> Basis:
    """All logicals basic, every column nonbasic at its natural bound."""
    return Basis(nonbasic_status(lp.col_lower, lp.col_upper), np.zeros(lp.m, dtype=np.int8))


def normalize_nonbasic(basis: Basis, lp: LinearProgram) -> Basis:
    """Make every nonbasic status agree with the current bounds.

    A bound that moved can leave a status pointing at an infinite bound
    (at_upper with upper = inf) or call a now-fixed variable at_lower. The
    value is kept on the same side where possible.
    """
    out = basis.copy()
    for status, lower, upper in (
        (out.col_status, lp.col_lower, lp.col_upper),
        (out.row_status, lp.row_lower, lp.row_upper),
    ):
        nb = status != Status.BASIC
        fixed = nb & (lower == upper)
        lo_ok = np.isfinite(lower)
        up_ok = np.isfinite(upper)
        at_lo = nb & ~fixed & (status == Status.AT_LOWER)
        at_up = nb & ~fixed & (status == Status.AT_UPPER)
        free = nb & ~fixed & ((status == Status.FREE) | (status == Status.FIXED))
        status[fixed] = Status.FIXED
        status[at_lo & ~lo_ok & up_ok] = Status.AT_UPPER
        status[at_lo & ~lo_ok & ~up_ok] = Status.FREE
        status[at_up & ~up_ok & lo_ok] = Status.AT_LOWER
        status[at_up & ~up_ok & ~lo_ok] = Status.FREE
        # a FREE or FIXED status on a variable whose bounds changed takes the
        # natural status of its new bounds (FREE when both are infinite)
        natural = nonbasic_status(lower, upper)
        status[free] = natural[free]
    return out


def remap(
    basis: Basis,
    old_col_names: list[str],
    old_row_names: list[str],
    lp: LinearProgram,
    col_source: np.ndarray | None = None,
    row_source: np.ndarray | None = None,
) -> tuple[Basis, dict]:
    """Carry a basis over to a changed model by matching names.

    New rows get a basic logical (so the old basic columns plus the new
    logicals still form a square basis); new columns start nonbasic at their
    natural bound. Removed rows and columns drop out, which can leave the
    count of basics wrong; ``repair`` in the simplex module fixes that with a
    factorization at hand. Returns the basis and a small report.
    """
    # col_source / row_source (new index -> old index, -1 for new) skip matching
    # names when the caller already knows them (the document layer does)
    if col_source is not None:
        col_idx = np.asarray(col_source, dtype=np.int64)
    else:
        col_pos = {name: j for j, name in enumerate(old_col_names)}
        col_idx = np.array([col_pos.get(name, -1) for name in lp.col_names], dtype=np.int64)
    if row_source is not None:
        row_idx = np.asarray(row_source, dtype=np.int64)
    else:
        row_pos = {name: i for i, name in enumerate(old_row_names)}
        row_idx = np.array([row_pos.get(name, -1) for name in lp.row_names], dtype=np.int64)
    if col_idx.shape != (lp.n,) or row_idx.shape != (lp.m,):
        raise ValueError("index maps must have one entry per column and per row of the new model")
    col_status = nonbasic_status(lp.col_lower, lp.col_upper)
    kept = col_idx >= 0
    col_status[kept] = basis.col_status[col_idx[kept]]
    row_status = np.zeros(lp.m, dtype=np.int8)
    kept_r = row_idx >= 0
    row_status[kept_r] = basis.row_status[row_idx[kept_r]]
    out = normalize_nonbasic(Basis(col_status, row_status), lp)
    report = {
        "columns_added": int((~kept).sum()),
        "rows_added": int((~kept_r).sum()),
        "columns_removed": len(old_col_names) - int(kept.sum()),
        "rows_removed": len(old_row_names) - int(kept_r.sum()),
    }
    return out, report
