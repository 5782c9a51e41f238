"""MPS reading and writing: Netlib counts, section semantics, round trips, bad input."""

from __future__ import annotations

import gzip
import os
import tempfile
from pathlib import Path

import highspy
import numpy as np
import pytest
import scipy.sparse as sp

from service.lp.highs_cold import solve_highs
from service.lp.model import MAXIMIZE, MINIMIZE, LinearProgram
from service.lp.mps import MpsError, read_mps, read_mps_report, write_mps
from service.lp.result import OPTIMAL, SolveOptions

from .netlib import netlib_dir, netlib_problem, netlib_problems

PROBLEMS = netlib_problems()
IDS = [p.name for p in PROBLEMS]


def _lp_by_name(lp: LinearProgram):
    return {n: j for j, n in enumerate(lp.col_names)}, {n: i for i, n in enumerate(lp.row_names)}


def _temp_leftovers() -> set[str]:
    return {p for p in os.listdir(tempfile.gettempdir()) if p.startswith("hotbasis-mps-")}


def test_netlib_data_present():
    # Guard: without the data the parametrized Netlib tests below would silently vanish.
    assert netlib_dir().is_dir(), f"Netlib data not found at {netlib_dir()} (set HOTBASIS_NETLIB_DIR)"
    assert len(PROBLEMS) >= 35
    assert all(p.path.is_file() for p in PROBLEMS)


@pytest.mark.parametrize("prob", PROBLEMS, ids=IDS)
def test_netlib_counts(prob):
    # Row/column counts: Netlib published table, shared/data/netlib/optimal.csv.
    lp = read_mps(prob.path)
    assert (lp.m, lp.n) == (prob.rows, prob.columns)
    assert len(set(lp.col_names)) == lp.n and len(set(lp.row_names)) == lp.m
    assert lp.sense == MINIMIZE


def test_objective_rhs_convention_e226():
    # e226's objective row carries RHS -7.113 (see the file). We store
    # offset = -rhs, which gives the optimum in shared/data/netlib/optimal.csv
    # (-11.638929066); c @ x alone is -18.751929066, the published table's
    # value quoted in shared/data/netlib/README.md.
    prob = netlib_problem("e226")
    lp = read_mps(prob.path)
    assert lp.offset == pytest.approx(7.113, abs=1e-12)
    res = solve_highs(lp, SolveOptions())
    assert res.status == OPTIMAL
    assert res.objective == pytest.approx(prob.optimum, rel=1e-9)
    assert float(lp.c @ res.x) == pytest.approx(-18.751929066, rel=1e-9)


def test_ranges_in_netlib_files():
    # boeing2: "RANGE1 DMBOSORD 61." on an L row with RHS 302 -> [241, 302];
    # "RANGE1 DMLGACLE 104." on an L row with RHS 517 -> [413, 517].
    lp = read_mps(netlib_problem("boeing2").path)
    _, rows = _lp_by_name(lp)
    i = rows["DMBOSORD"]
    assert (lp.row_lower[i], lp.row_upper[i]) == (241.0, 302.0)
    i = rows["DMLGACLE"]
    assert (lp.row_lower[i], lp.row_upper[i]) == (413.0, 517.0)
    # forplan (fixed layout, names with spaces): G row LTSYCT, RHS 10, range 284990 -> [10, 285000].
    lp = read_mps(netlib_problem("forplan").path)
    cols, rows = _lp_by_name(lp)
    i = rows["LTSYCT"]
    assert (lp.row_lower[i], lp.row_upper[i]) == (10.0, 285000.0)
    assert "DEDO3 11" in cols  # a name with a space survives the fixed layout
    assert lp.col_upper[cols["DEDO3 11"]] == 200000.0


def test_fx_fr_bounds_in_netlib_files():
    # capri: "FX BNDS1 WK1G78 8.07907" and "FR BNDS1 RVAD72".
    lp = read_mps(netlib_problem("capri").path)
    cols, _ = _lp_by_name(lp)
    j = cols["WK1G78"]
    assert lp.col_lower[j] == lp.col_upper[j] == 8.07907
    j = cols["RVAD72"]
    assert lp.col_lower[j] == -np.inf and lp.col_upper[j] == np.inf
    # vtpbase: "FR BOUND FOC....." (dots are part of the name).
    lp = read_mps(netlib_problem("vtpbase").path)
    cols, _ = _lp_by_name(lp)
    j = cols["FOC....."]
    assert lp.col_lower[j] == -np.inf and lp.col_upper[j] == np.inf


# The shared Netlib subset has no MI, PL, negative UP or extra free rows; a
# hand-written model covers them (free layout) ...
SECTIONS_FREE = """NAME          SECTIONS
* comment lines are ignored
OBJSENSE
    MAX
ROWS
 N  PROFIT
 L  CAP
 G  DEMAND
 E  BAL
 N  MEMO
 E  SPREAD
COLUMNS
    MAKE      PROFIT       3.0   CAP          1.0
    MAKE      DEMAND       1.0   MEMO         5.0
    BUY       PROFIT      -1.0   CAP          1.0
    BUY       BAL         -1.0
    STOCK     PROFIT       0.5   BAL          1.0
    SHIFT     PROFIT       1.0   DEMAND       1.0
    SHIFT     SPREAD       1.0
    SPARE     PROFIT       2.0   CAP          1.0
    LOAN      PROFIT      -0.1   BAL          1.0
RHS
    RHS       PROFIT      -5.0
    RHS       CAP          4.0   DEMAND       1.0
    RHS       BAL          7.0   SPREAD       2.0
RANGES
    RNG       CAP          2.5   DEMAND       3.0
    RNG       BAL          2.0   SPREAD      -2.0
BOUNDS
 UP BND       MAKE         4.0
 MI BND       BUY
 UP BND       BUY          1.0
 PL BND       STOCK
 UP BND       SHIFT       -1.0
 FR BND       SPARE
 LO BND       LOAN         0.0
 UP BND       LOAN        -2.0
ENDATA
"""


def test_sections_free_layout():
    lp = read_mps(SECTIONS_FREE)
    assert lp.name == "SECTIONS"
    assert lp.sense == MAXIMIZE
    assert lp.offset == 5.0  # RHS -5 on the objective row: constant = -rhs
    # MEMO (a second N row) is dropped, like the Netlib table counts rows.
    assert lp.row_names == ["CAP", "DEMAND", "BAL", "SPREAD"]
    # RANGES: L [rhs-|R|, rhs]; G [rhs, rhs+|R|]; E R>0 [rhs, rhs+R]; E R<0 [rhs+R, rhs].
    assert lp.row_lower.tolist() == [1.5, 1.0, 7.0, 0.0]
    assert lp.row_upper.tolist() == [4.0, 4.0, 9.0, 2.0]
    cols, _ = _lp_by_name(lp)
    bounds = {name: (lp.col_lower[j], lp.col_upper[j]) for name, j in cols.items()}
    assert bounds["MAKE"] == (0.0, 4.0)
    assert bounds["BUY"] == (-np.inf, 1.0)  # MI then UP
    assert bounds["STOCK"] == (0.0, np.inf)  # PL
    assert bounds["SHIFT"] == (-np.inf, -1.0)  # negative UP, no LO: lower becomes -inf
    assert bounds["SPARE"] == (-np.inf, np.inf)  # FR
    assert bounds["LOAN"] == (0.0, -2.0)  # explicit LO 0 is kept (inconsistent, as written)
    assert lp.c.tolist() == [3.0, -1.0, 0.5, 1.0, 2.0, -0.1]
    dense = lp.A.toarray()
    assert dense[0].tolist() == [1.0, 1.0, 0.0, 0.0, 1.0, 0.0]
    assert dense[2].tolist() == [0.0, -1.0, 1.0, 0.0, 0.0, 1.0]


# ... and the same in the fixed layout: fields at columns 2-3, 5-12, 15-22,
# 25-36, 40-47, 50-61 (names may hold spaces there).
def _fixed(f1: str = "", f2: str = "", f3: str = "", f4: str = "", f5: str = "", f6: str = "") -> str:
    return f" {f1:<2} {f2:<8}  {f3:<8}  {f4:>12}   {f5:<8}  {f6:>12}".rstrip()


SECTIONS_FIXED = "\n".join(
    [
        "NAME          FIXEDLAY",
        "ROWS",
        " N  COST",
        " L  LIM 1",
        " G  LIM 2",
        "COLUMNS",
        _fixed("", "X ONE", "COST", "1.0", "LIM 1", "1.0"),
        _fixed("", "X ONE", "LIM 2", "1.0"),
        _fixed("", "X TWO", "COST", "2.0", "LIM 1", "1.0"),
        _fixed("", "X THREE", "COST", "-1.0", "LIM 2", "1.0"),
        "RHS",
        _fixed("", "RHS", "LIM 1", "4.0", "LIM 2", "-3.0"),
        "BOUNDS",
        _fixed("UP", "BND", "X TWO", "-2.0"),
        _fixed("MI", "BND", "X THREE"),
        _fixed("UP", "BND", "X THREE", "5.0"),
        _fixed("FX", "BND", "X ONE", "1.5"),
        "ENDATA",
        "",
    ]
)


def test_sections_fixed_layout_names_with_spaces():
    lp = read_mps(SECTIONS_FIXED)
    assert lp.col_names == ["X ONE", "X TWO", "X THREE"]
    assert lp.row_names == ["LIM 1", "LIM 2"]
    assert lp.col_lower.tolist() == [1.5, -np.inf, -np.inf]
    assert lp.col_upper.tolist() == [1.5, -2.0, 5.0]
    assert lp.row_lower.tolist() == [-np.inf, -3.0]
    assert lp.row_upper.tolist() == [4.0, np.inf]
    assert lp.c.tolist() == [1.0, 2.0, -1.0]
    assert lp.A.toarray().tolist() == [[1.0, 1.0, 0.0], [1.0, 0.0, 1.0]]


def test_input_forms(tmp_path: Path):
    prob = netlib_problem("afiro")
    ref = read_mps(prob.path)
    raw = gzip.decompress(prob.path.read_bytes())
    plain = tmp_path / "afiro.mps"
    plain.write_bytes(raw)
    for source in (str(prob.path), prob.path, plain, str(plain), raw, raw.decode(), prob.path.read_bytes()):
        lp = read_mps(source)
        assert (lp.m, lp.n) == (ref.m, ref.n)
        assert (lp.A != ref.A).nnz == 0
        assert np.array_equal(lp.c, ref.c)


@pytest.mark.parametrize(
    "source, fragment",
    [
        (b"", "empty"),
        ("   \n  \n", "empty"),
        ("this is not\nan MPS file\n", "could not read MPS input"),
        (b"\x1f\x8b\x08\x00garbage", "gzip"),
        ("/no/such/dir/model.mps", "not found"),
        (12345, "cannot read MPS"),
    ],
)
def test_bad_input_raises(source, fragment):
    before = _temp_leftovers()
    with pytest.raises(MpsError) as info:
        read_mps(source)
    assert fragment in str(info.value)
    assert "Traceback" not in str(info.value)
    assert _temp_leftovers() <= before  # no temporary files left behind


def test_integer_and_quadratic_rejected():
    mip = (
        "NAME M\nROWS\n N obj\n L c1\nCOLUMNS\n"
        "    MARKER                 'MARKER'                 'INTORG'\n"
        "    x obj 1 c1 1\n"
        "    MARKER                 'MARKER'                 'INTEND'\n"
        "RHS\n    RHS c1 4\nENDATA\n"
    )
    with pytest.raises(MpsError, match="integer"):
        read_mps(mip)
    qp = (
        "NAME Q\nROWS\n N obj\n L c1\nCOLUMNS\n    x obj 1 c1 1\nRHS\n    RHS c1 4\n"
        "QUADOBJ\n    x x 2.0\nENDATA\n"
    )
    with pytest.raises(MpsError, match="quadratic"):
        read_mps(qp)


def test_reader_warnings_and_strict():
    text = "NAME W\nROWS\n N obj\n L c1\nCOLUMNS\n    x obj 1 c1 1\n    x nosuchrow 2\nRHS\n    RHS c1 4\nENDATA\n"
    lp, warnings = read_mps_report(text)
    assert lp.m == 1 and lp.n == 1
    assert any("nosuchrow" in w for w in warnings)
    with pytest.raises(MpsError, match="nosuchrow"):
        read_mps_report(text, strict=True)


# ------------------------------------------------------------------ writing


def _assert_same_lp(a: LinearProgram, b: LinearProgram):
    assert (a.m, a.n) == (b.m, b.n)
    assert a.col_names == b.col_names and a.row_names == b.row_names
    assert a.sense == b.sense and a.offset == b.offset
    assert (a.A != b.A).nnz == 0
    assert np.array_equal(a.c, b.c)
    assert np.array_equal(a.col_lower, b.col_lower) and np.array_equal(a.col_upper, b.col_upper)
    # Exact, two-sided rows included (the writer picks a range that reads back exactly).
    assert np.array_equal(a.row_lower, b.row_lower) and np.array_equal(a.row_upper, b.row_upper)


@pytest.mark.parametrize("prob", PROBLEMS, ids=IDS)
def test_netlib_round_trip(prob):
    lp = read_mps(prob.path)
    text = write_mps(lp)
    back = read_mps(text)
    _assert_same_lp(lp, back)
    # Same optimum after the round trip (reference solve: HiGHS via highspy),
    # and both equal the Netlib published optimum (optimal.csv).
    r1 = solve_highs(lp, SolveOptions())
    r2 = solve_highs(back, SolveOptions())
    assert r1.status == r2.status == OPTIMAL
    assert r2.objective == pytest.approx(r1.objective, rel=1e-9, abs=1e-9)
    assert r2.objective == pytest.approx(prob.optimum, rel=1e-6)


def _awkward_lp() -> LinearProgram:
    A = sp.csc_matrix(
        np.array(
            [
                [1.0, 2.0, 0.0, 0.0, 0.0, 0.0, 1.0],
                [0.0, 1.0, -1.0, 0.0, 0.0, 0.0, 0.0],
                [3.0, 0.0, 0.0, 0.5, 0.0, 0.0, 0.0],
                [1.0, 1.0, 1.0, 1.0, 0.0, 0.0, 0.0],
                [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
            ]
        )
    )
    inf = np.inf
    return LinearProgram(
        A=A,
        c=np.array([1.5, -2.0, 0.1, 0.0, 0.0, 1e-17, 3.0]),
        col_lower=np.array([0.0, -inf, -inf, 2.5, -3.0, 1.0, -1.0]),
        col_upper=np.array([10.0, 4.0, inf, 2.5, -1.0, 1.0, -0.25]),
        row_lower=np.array([-inf, 1.0, 0.1, -inf, -1e-3]),
        row_upper=np.array([7.0, 1.0, 0.3, inf, 5.0]),
        sense=MAXIMIZE,
        offset=-12.75,
        # spaces, a duplicate, unicode, a name that looks like a number, a row named like the objective
        col_names=["plant 1 output", "dup", "dup", "lager-München", "1", "$cash", ""],
        row_names=["obj", "balance west", "cap", "free memo", "empty"],
        name="awkward model",
    )


def test_round_trip_awkward_model():
    lp = _awkward_lp()
    lp.row_lower[3] = -np.inf  # a free row besides the objective
    text = write_mps(lp)
    assert "OBJSENSE" in text and "RANGES" in text and "BOUNDS" in text
    for kind in (" FR ", " FX ", " MI ", " UP ", " LO "):
        assert kind in text
    back = read_mps(text)
    # Names come back except a repeated one: a model read from MPS always has
    # unique names, so the second "dup" keeps its generated name.
    assert back.col_names == ["plant 1 output", "dup", "_c2", "lager-München", "1", "$cash", ""]
    back.col_names = list(lp.col_names)
    _assert_same_lp(lp, back)
    assert back.name == "awkward model"
    # Free MPS text never holds a name with whitespace.
    for line in text.splitlines():
        if line.startswith(" ") and not line.startswith("*"):
            assert "plant 1 output" not in line and "balance west" not in line


def test_name_map_cannot_create_duplicates():
    # Hand-edited (or hostile) name-map comments must not yield duplicate names.
    text = (
        "NAME N\n"
        '* name-map col a "same"\n'
        '* name-map col b "same"\n'
        '* name-map col c "b"\n'
        '* name-map row r1 "first row"\n'
        "ROWS\n N obj\n L r1\nCOLUMNS\n    a obj 1 r1 1\n    b obj 1 r1 1\n    c obj 1 r1 1\n"
        "RHS\n    RHS r1 4\nENDATA\n"
    )
    lp = read_mps(text)
    assert lp.col_names == ["same", "b", "c"]
    assert lp.row_names == ["first row"]


def test_round_trip_keeps_infeasible_bounds_as_written():
    # lower 0 > upper -1: the writer emits LO 0 so the negative-UP rule does not apply.
    lp = LinearProgram(
        A=sp.csc_matrix(np.array([[1.0, 1.0]])),
        c=np.array([1.0, 1.0]),
        col_lower=np.array([0.0, 0.0]),
        col_upper=np.array([-1.0, 3.0]),
        row_lower=np.array([0.0]),
        row_upper=np.array([np.inf]),
    )
    back = read_mps(write_mps(lp))
    assert back.col_lower.tolist() == [0.0, 0.0] and back.col_upper.tolist() == [-1.0, 3.0]


def test_written_text_readable_by_highs_directly(tmp_path: Path):
    # Reference reader: HiGHS via highspy reads our text with no faults and the
    # same optimum (Netlib afiro, optimum from optimal.csv).
    prob = netlib_problem("afiro")
    path = tmp_path / "afiro_out.mps"
    path.write_text(write_mps(read_mps(prob.path)))
    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    assert h.readModel(str(path)) == highspy.HighsStatus.kOk
    h.run()
    assert h.getInfo().objective_function_value == pytest.approx(prob.optimum, rel=1e-9)


def test_bounds_apply_in_file_order():
    # Traditional MPS bound semantics (applied line by line): FR then UP keeps the
    # lower bound free; MI then UP likewise; a negative UP with no lower bound
    # before it frees the lower bound, and a later LO sets it again.
    text = b"""NAME ORDER
ROWS
 N obj
 L c1
COLUMNS
 X1 obj 1 c1 1
 X2 obj 1 c1 1
 X3 obj -1 c1 1
 X4 obj 1 c1 1
RHS
 RHS c1 100
BOUNDS
 FR BND X3
 UP BND X3 10.0
 UP BND X4 -2
 MI BND X1
 UP BND X1 5
 UP BND X2 -3
 LO BND X2 -7
ENDATA
"""
    lp = read_mps(text)
    bounds = {name: (lo, up) for name, lo, up in zip(lp.col_names, lp.col_lower, lp.col_upper)}
    assert bounds["X3"] == (-np.inf, 10.0)
    assert bounds["X1"] == (-np.inf, 5.0)
    assert bounds["X4"] == (-np.inf, -2.0)
    assert bounds["X2"] == (-7.0, -3.0)
