"""Basis records (service/lp/basis.py): binary round trip, slack basis, status normalization, remap."""

from __future__ import annotations

import struct

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from service.lp import Basis, BasisError, LinearProgram, SolveOptions, Status, remap, reoptimize, slack_basis
from service.lp.basis import normalize_nonbasic

INF = np.inf
B, L, U, X, F = Status.BASIC, Status.AT_LOWER, Status.AT_UPPER, Status.FIXED, Status.FREE


def lp_with_bounds(col_lower, col_upper, row_lower=None, row_upper=None, col_names=None, row_names=None):
    n = len(col_lower)
    m = 1 if row_lower is None else len(row_lower)
    return LinearProgram(
        A=sp.csc_matrix(np.ones((m, n))),
        c=np.ones(n),
        col_lower=col_lower,
        col_upper=col_upper,
        row_lower=[-INF] * m if row_lower is None else row_lower,
        row_upper=[10.0] * m if row_upper is None else row_upper,
        col_names=col_names or [],
        row_names=row_names or [],
    )


# ------------------------------------------------------------------ binary encoding
@settings(max_examples=60, deadline=None)
@given(
    cols=st.lists(st.sampled_from(list(Status)), max_size=40),
    rows=st.lists(st.sampled_from(list(Status)), max_size=40),
)
def test_bytes_round_trip(cols, rows):
    basis = Basis(np.array(cols, dtype=np.int8), np.array(rows, dtype=np.int8))
    data = basis.to_bytes()
    assert len(data) == 12 + len(cols) + len(rows)
    back = Basis.from_bytes(data)
    assert back.n == len(cols) and back.m == len(rows)
    assert np.array_equal(back.col_status, basis.col_status)
    assert np.array_equal(back.row_status, basis.row_status)
    assert back.col_status.dtype == np.int8
    # the decoded arrays must be writable copies, not views into the bytes
    if back.n:
        back.col_status[0] = Status.BASIC


def test_header_layout():
    data = Basis([L, B], [U]).to_bytes()
    assert data[:4] == b"HBB1"
    assert struct.unpack_from("<II", data, 4) == (2, 1)
    assert list(data[12:]) == [int(L), int(B), int(U)]


@pytest.mark.parametrize(
    "data",
    [
        b"",
        b"HBB1",
        b"HBB1" + struct.pack("<I", 2),  # header cut short
        b"XXXX" + struct.pack("<II", 1, 1) + bytes([0, 0]),  # wrong magic
        b"HBB1" + struct.pack("<II", 2, 1) + bytes([0, 0]),  # one status missing
        b"HBB1" + struct.pack("<II", 1, 1) + bytes([0, 0, 0]),  # one status too many
        b"HBB1" + struct.pack("<II", 1, 1) + bytes([0, 5]),  # unknown status code
        b"HBB1" + struct.pack("<II", 1, 1) + bytes([0xFF, 0]),  # negative int8
        b"HBB1" + struct.pack("<II", 2**31, 2**31),  # absurd sizes, no body
    ],
)
def test_corrupted_input_raises(data):
    with pytest.raises(BasisError):
        Basis.from_bytes(data)


def test_empty_basis_round_trip():
    back = Basis.from_bytes(Basis([], []).to_bytes())
    assert back.n == 0 and back.m == 0


# ------------------------------------------------------------------ slack basis
def test_slack_basis_statuses():
    lp = lp_with_bounds(
        col_lower=[0.0, -INF, -INF, 2.0, -3.0],
        col_upper=[INF, 5.0, INF, 2.0, 4.0],
        row_lower=[-INF, 1.0],
        row_upper=[3.0, INF],
    )
    basis = slack_basis(lp)
    assert list(basis.col_status) == [L, U, F, X, L]
    assert list(basis.row_status) == [B, B]
    assert basis.basic_count() == lp.m


# ------------------------------------------------------------------ normalize_nonbasic
def test_normalize_bound_moved_to_infinity():
    lp = lp_with_bounds(
        col_lower=[-INF, -INF, 0.0, -INF, 1.0],
        col_upper=[4.0, INF, INF, INF, 1.0],
    )
    before = Basis([L, L, U, U, L], [B])
    out = normalize_nonbasic(before, lp)
    # lower gone -> the finite upper; both gone -> free; upper gone -> lower; now fixed -> fixed
    assert list(out.col_status) == [U, F, L, F, X]
    assert list(before.col_status) == [L, L, U, U, L]  # input left alone


def test_normalize_keeps_basics_and_valid_statuses():
    lp = lp_with_bounds(col_lower=[0.0, 0.0, -INF], col_upper=[5.0, 5.0, INF])
    basis = Basis([B, U, F], [L])
    lp.row_lower[:] = 1.0
    out = normalize_nonbasic(basis, lp)
    assert list(out.col_status) == [B, U, F]
    assert list(out.row_status) == [L]


def test_normalize_fixed_and_free_become_natural_when_bounds_open():
    lp = lp_with_bounds(col_lower=[0.0, -INF, 2.0], col_upper=[9.0, 7.0, INF])
    out = normalize_nonbasic(Basis([X, F, F], [B]), lp)
    assert list(out.col_status) == [L, U, L]


def test_normalize_rows_like_columns():
    lp = lp_with_bounds(
        col_lower=[0.0], col_upper=[1.0], row_lower=[-INF, 2.0, -INF], row_upper=[INF, 2.0, 5.0]
    )
    out = normalize_nonbasic(Basis([B], [U, L, L]), lp)
    assert list(out.row_status) == [F, X, U]


def test_normalize_fixed_variable_made_free():
    lp = lp_with_bounds(col_lower=[-INF], col_upper=[INF])
    out = normalize_nonbasic(Basis([X], [B]), lp)
    assert list(out.col_status) == [F]


def test_reoptimize_after_unfixing_to_free_stays_warm():
    # x0 was fixed (stored status FIXED); the change removes both its bounds.
    lp = LinearProgram(
        A=sp.csc_matrix([[1.0, 1.0]]),
        c=[1.0, 1.0],
        col_lower=[-INF, 0.0],
        col_upper=[INF, 10.0],
        row_lower=[1.0],
        row_upper=[INF],
    )
    res = reoptimize(lp, Basis([X, L], [B]), SolveOptions())
    assert res.fallback is None, res.fallback


@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_normalize_result_is_always_consistent(data):
    """Every nonbasic status names a finite bound (or free with none), fixed iff lower == upper."""
    n = data.draw(st.integers(1, 8))
    bound = st.sampled_from([-INF, -2.0, 0.0, 3.0, INF])
    lo = np.array(data.draw(st.lists(bound, min_size=n, max_size=n)))
    up = np.array(data.draw(st.lists(bound, min_size=n, max_size=n)))
    lo, up = np.minimum(lo, up), np.maximum(lo, up)
    lo[lo == INF] = 3.0
    up[up == -INF] = -2.0
    lo, up = np.minimum(lo, up), np.maximum(lo, up)
    statuses = np.array(data.draw(st.lists(st.sampled_from([L, U, X, F]), min_size=n, max_size=n)))
    lp = lp_with_bounds(col_lower=lo, col_upper=up)
    out = normalize_nonbasic(Basis(statuses.astype(np.int8), [B]), lp)
    for s, a, b in zip(out.col_status, lo, up):
        if s == L:
            assert np.isfinite(a) and a < b
        elif s == U:
            assert np.isfinite(b) and a < b
        elif s == X:
            assert a == b
        elif s == F:
            # a formerly FREE/FIXED column with a finite bound must have been moved onto it
            assert not np.isfinite(a) and not np.isfinite(b), f"free status kept with bounds [{a}, {b}]"
        else:
            pytest.fail(f"basic or unknown status {s} after normalization")


# ------------------------------------------------------------------ remap
def test_remap_by_name_with_added_and_removed():
    old_cols = ["ship_a", "ship_b", "make_c", "buy_d"]
    old_rows = ["cap_1", "dem_2", "bal_3"]
    old = Basis([B, L, B, U], [L, B, U])
    lp = lp_with_bounds(
        col_lower=[0.0, 0.0, 0.0, 0.0],
        col_upper=[5.0, INF, INF, 8.0],
        row_lower=[0.0, 0.0, 0.0],
        row_upper=[1.0, 1.0, 1.0],
        # make_c removed, new_e added, order shuffled
        col_names=["buy_d", "new_e", "ship_a", "ship_b"],
        # cap_1 removed, new_row added
        row_names=["bal_3", "new_row", "dem_2"],
    )
    out, report = remap(old, old_cols, old_rows, lp)
    assert list(out.col_status) == [U, L, B, L]
    assert list(out.row_status) == [U, B, B]
    assert report == {"columns_added": 1, "rows_added": 1, "columns_removed": 1, "rows_removed": 1}


def test_remap_new_column_with_upper_bound_only_starts_at_upper():
    lp = lp_with_bounds(col_lower=[0.0, -INF], col_upper=[INF, 4.0], col_names=["a", "b"], row_names=["r"])
    out, report = remap(Basis([B], [L]), ["a"], ["r"], lp)
    assert list(out.col_status) == [B, U]
    assert report["columns_added"] == 1 and report["columns_removed"] == 0


def test_remap_normalizes_carried_statuses():
    """A carried at_upper whose upper bound was removed must not survive."""
    lp = lp_with_bounds(col_lower=[0.0], col_upper=[INF], col_names=["a"], row_names=["r"])
    out, _ = remap(Basis([U], [B]), ["a"], ["r"], lp)
    assert list(out.col_status) == [L]


def test_remap_identity():
    lp = lp_with_bounds(
        col_lower=[0.0, 0.0], col_upper=[1.0, 1.0], row_lower=[0.0], col_names=["a", "b"], row_names=["r"]
    )
    old = Basis([B, U], [L])
    out, report = remap(old, ["a", "b"], ["r"], lp)
    assert np.array_equal(out.col_status, old.col_status)
    assert np.array_equal(out.row_status, old.row_status)
    assert report == {"columns_added": 0, "rows_added": 0, "columns_removed": 0, "rows_removed": 0}


def test_remap_with_index_maps_equals_remap_by_names():
    """The document layer knows new -> old indices; passing them must give the same basis."""
    old = LinearProgram(
        A=sp.csc_matrix(np.array([[1.0, 2.0, 0.0], [0.0, 1.0, 1.0]])),
        c=[1.0, 1.0, 1.0],
        col_lower=[0.0, 0.0, 0.0],
        col_upper=[INF, 5.0, INF],
        row_lower=[-INF, 1.0],
        row_upper=[4.0, INF],
        col_names=["a", "b", "c"],
        row_names=["r", "s"],
    )
    basis = Basis([B, 2, 1], [B, 1])
    new = LinearProgram(  # column "a" removed, "d" added; row "t" added
        A=sp.csc_matrix(np.array([[2.0, 0.0, 1.0], [1.0, 1.0, 0.0], [1.0, 1.0, 1.0]])),
        c=[1.0, 1.0, 2.0],
        col_lower=[0.0, 0.0, 0.0],
        col_upper=[5.0, INF, 3.0],
        row_lower=[-INF, 1.0, -INF],
        row_upper=[4.0, INF, 9.0],
        col_names=["b", "c", "d"],
        row_names=["r", "s", "t"],
    )
    by_name, report_a = remap(basis, old.col_names, old.row_names, new)
    by_index, report_b = remap(
        basis,
        old.col_names,
        old.row_names,
        new,
        col_source=np.array([1, 2, -1]),
        row_source=np.array([0, 1, -1]),
    )
    assert np.array_equal(by_name.col_status, by_index.col_status)
    assert np.array_equal(by_name.row_status, by_index.row_status)
    assert report_a == report_b
    with pytest.raises(ValueError):
        remap(basis, old.col_names, old.row_names, new, col_source=np.array([1, 2]))
