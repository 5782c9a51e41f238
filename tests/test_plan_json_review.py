"""Review of the plan encoder (service/plan_json.py), solution_json/render_result (service/serialize.py)
and moved_either.

References: orjson.dumps of the plain dict-of-dicts that solution_json built before the encoder
(the form reproduced in ``_plan_as_dicts`` below), compared byte for byte; json.loads (standard
library) for the answer a client reads; numpy.union1d for moved_either.
"""

from __future__ import annotations

import json
import math

import numpy as np
import orjson
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from service.lp import LinearProgram
from service.lp.basis import STATUS_NAMES, Basis, Status
from service.plan_json import plan_object
from service.serialize import ZERO, moved_either, plan_positions, render_result, solution_json
from service.store import Solution, VersionRecord

KEYS = ("value", "reduced_cost", "basis")
WORDS = [STATUS_NAMES[s] for s in Status]

# any text orjson can encode (it refuses lone surrogates, as it does for dict keys)
names_strategy = st.text(st.characters(blacklist_categories=("Cs",)), max_size=40)
special = st.sampled_from([0.0, -0.0, 5e-324, -5e-324, 1e-13, -1e-12, 1e-12, 1e-300, 1.7976931348623157e308,
                           1e16, 1e-7, 0.1, 1 / 3, math.nan, math.inf, -math.inf])  # fmt: skip
values_strategy = st.one_of(special, st.floats(allow_nan=True, allow_infinity=True))


def _plain(values: np.ndarray | None, count: int) -> list:
    """A number array as the earlier dict form wrote it: |v| < ZERO -> 0.0, non-finite -> None."""
    if values is None:
        return [None] * count
    out = []
    for v in values.tolist():
        if not math.isfinite(v):
            out.append(None)
        else:
            out.append(0.0 if abs(v) < ZERO else v + 0.0)
    return out


def _plan_as_dicts(lp: LinearProgram, sol: Solution, basis: Basis | None, view: str, record=None):
    """solution_json's answer built as dicts (the form before the compiled encoder)."""
    picked = plan_positions(lp, sol, basis, view, record)  # which entries: shared, the encoding is under test
    if picked is None:
        return None
    cols, rows = picked

    def pick(arr, idx):
        return _plain(None if arr is None else arr[idx], idx.size)

    col_st = [WORDS[c] for c in basis.col_status[cols].tolist()] if basis is not None else [None] * cols.size
    row_st = [WORDS[c] for c in basis.row_status[rows].tolist()] if basis is not None else [None] * rows.size
    variables = {
        lp.col_names[j]: {"value": v, "reduced_cost": d, "basis": s}
        for j, v, d, s in zip(cols.tolist(), pick(sol.x, cols), pick(sol.reduced_cost, cols), col_st)
    }
    constraints = {
        lp.row_names[i]: {"activity": a, "shadow_price": y, "basis": s}
        for i, a, y, s in zip(
            rows.tolist(), pick(sol.row_activity, rows), pick(sol.shadow_price, rows), row_st
        )
    }
    return {"variables": variables, "constraints": constraints}


# ------------------------------------------------------------------ plan_object
@settings(max_examples=150, deadline=None)
@given(
    names=st.lists(names_strategy, max_size=25, unique=True),
    data=st.data(),
    missing=st.sampled_from(["none", "first", "second", "both"]),
    words=st.sampled_from([WORDS, [None], ["", 'q"uote', "back\\", "\x00ctl", "日本"]]),
)
def test_plan_object_is_what_orjson_writes_for_the_dicts(names, data, missing, words):
    n = len(names)
    first = np.array(data.draw(st.lists(values_strategy, min_size=n, max_size=n)), dtype=np.float64)
    second = np.array(data.draw(st.lists(values_strategy, min_size=n, max_size=n)), dtype=np.float64)
    codes = np.array(
        data.draw(st.lists(st.integers(0, len(words) - 1), min_size=n, max_size=n)), dtype=np.int64
    )
    a = None if missing in ("first", "both") else first
    b = None if missing in ("second", "both") else second
    got = orjson.dumps(plan_object(names, KEYS, a, b, codes, words))

    def cell(arr, j):
        if arr is None or not math.isfinite(arr[j]):
            return None
        return float(arr[j])

    expected = orjson.dumps(
        {
            nm: {KEYS[0]: cell(a, j), KEYS[1]: cell(b, j), KEYS[2]: words[codes[j]]}
            for j, nm in enumerate(names)
        }
    )
    assert got == expected
    assert list(json.loads(got)) == names  # the standard library reads it back, names intact and in order


def test_plan_object_large_plan_and_very_long_names():
    rng = np.random.default_rng(3)
    n = 120_000
    names = [f"lane_{j}" for j in range(n)]
    names[7] = "x" * 100_000 + '"\\'  # one very long name with characters that need escapes
    names[8] = "\u2028\u2029\x1f\x7f" * 1000
    first = rng.standard_normal(n) * 10.0 ** rng.integers(-15, 15, n)
    codes = rng.integers(0, len(WORDS), n)
    got = orjson.dumps(plan_object(names, KEYS, first, None, codes, WORDS))
    expected = orjson.dumps(
        {nm: {KEYS[0]: float(v), KEYS[1]: None, KEYS[2]: WORDS[c]} for nm, v, c in zip(names, first, codes)}
    )
    assert got == expected


def test_numpy_floats_are_written_like_python_floats():
    """The encoder relies on orjson writing a float64 array's elements exactly as it writes Python
    floats (and null for non-finite ones); random bit patterns cover every exponent."""
    rng = np.random.default_rng(11)
    v = rng.integers(0, 2**64 - 1, 200_000, dtype=np.uint64, endpoint=True).view(np.float64)
    from_numpy = orjson.dumps(v, option=orjson.OPT_SERIALIZE_NUMPY)
    from_python = orjson.dumps([x if math.isfinite(x) else None for x in v.tolist()])
    assert from_numpy == from_python


# ------------------------------------------------------------------ solution_json and render_result
def _model(rng: np.random.Generator, n: int, m: int, names: list[str]) -> LinearProgram:
    A = sp.random(m, n, density=0.3, random_state=rng, format="csc")
    return LinearProgram(A=A, c=np.ones(n), col_lower=np.zeros(n), col_upper=np.full(n, np.inf),
                         row_lower=np.zeros(m), row_upper=np.full(m, np.inf), col_names=names[:n],
                         row_names=names[n : n + m])  # fmt: skip


@settings(max_examples=80, deadline=None)
@given(
    names=st.lists(names_strategy, min_size=0, max_size=30, unique=True),
    split=st.integers(0, 30),
    data=st.data(),
    with_basis=st.booleans(),
    missing=st.sets(st.sampled_from(["row_activity", "shadow_price", "reduced_cost"])),
    view=st.sampled_from(["full", "nonzero", "moved"]),
)
def test_solution_json_matches_the_dict_form(names, split, data, with_basis, missing, view):
    n = min(split, len(names))
    m = len(names) - n
    rng = np.random.default_rng(len(names) * 31 + split)
    lp = _model(rng, n, m, names)

    def arr(size):
        return np.array(data.draw(st.lists(values_strategy, min_size=size, max_size=size)), dtype=np.float64)

    x = arr(n)
    x[~np.isfinite(x)] = 0.0  # a stored plan has finite values; the others may carry anything
    parts = {"row_activity": arr(m), "shadow_price": arr(m), "reduced_cost": arr(n)}
    for key in missing:
        parts[key] = None
    sol = Solution(x=x, **parts)
    basis = None
    if with_basis:
        basis = Basis(rng.integers(0, 5, n), rng.integers(0, 5, m))
    record = None
    if view == "moved":
        moved_cols = np.sort(rng.choice(n, size=int(rng.integers(0, n + 1)), replace=False)).astype(np.int32)
        moved_rows = moved_either(rng.integers(0, max(m, 1), 3 if m else 0), np.zeros(0, np.int64), m)
        record = VersionRecord(1, lp, basis, sol, {}, {}, moved_cols=moved_cols, moved_rows=moved_rows)
    got = solution_json(lp, sol, basis, view, record)
    expected = _plan_as_dicts(lp, sol, basis, view, record)
    assert orjson.dumps(got) == orjson.dumps(expected)


def test_render_result_encodes_with_orjson_and_reads_as_plain_json():
    """Every consumer of render_result encodes with orjson (the API's _json_response, the worker
    through jobs.finish); the fragments must come out as ordinary JSON objects there."""
    rng = np.random.default_rng(9)
    names = ["plant→DC", 'dock "B"', "c:\\path", "", "row\n1", "row 2"]
    lp = _model(rng, 3, 3, names)
    sol = Solution(np.array([1.5, -0.0, 1e-13]), np.array([2.0, np.nan, -7.25]), np.array([0.0, 3.0, -1e300]),
                   np.array([np.inf, 0.5, -2.0]))  # fmt: skip
    basis = Basis(np.array([0, 1, 4]), np.array([0, 2, 3]))
    result = {"status": "optimal", "objective": 1.5, "solve": {"method": "dual", "events": []},
              "pivot_log": [], "changes": None}  # fmt: skip
    record = VersionRecord(4, lp, basis, sol, result, {})
    for view in ("full", "nonzero", "none"):
        out = render_result("m-1", record, solution_view=view)
        body = json.loads(orjson.dumps({"result": out}))
        expected = _plan_as_dicts(lp, sol, basis, view, record)
        assert body["result"]["solution"] == (json.loads(orjson.dumps(expected)) if expected else None)
        assert body["result"]["version"] == 4
    full = json.loads(orjson.dumps(render_result("m-1", record)))["solution"]
    assert full["variables"]["plant→DC"] == {"value": 1.5, "reduced_cost": None, "basis": "basic"}
    assert (
        full["variables"]['dock "B"']["value"] == 0.0
        and math.copysign(1, full["variables"]['dock "B"']["value"]) > 0
    )
    assert full["constraints"]["row 2"] == {"activity": -7.25, "shadow_price": -1e300, "basis": "fixed"}


def test_empty_model_and_no_plan():
    lp = LinearProgram(A=sp.csc_matrix((0, 0)), c=[], col_lower=[], col_upper=[], row_lower=[], row_upper=[])
    sol = Solution(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0))
    assert orjson.dumps(solution_json(lp, sol, Basis([], []), "full")) == b'{"variables":{},"constraints":{}}'
    assert solution_json(lp, Solution(None, None, None, None), None, "full") is None


# ------------------------------------------------------------------ moved_either
@settings(max_examples=200, deadline=None)
@given(size=st.integers(0, 60), data=st.data())
def test_moved_either_is_the_sorted_union(size, data):
    pos = st.lists(st.integers(0, max(size - 1, 0)), max_size=40 if size else 0)
    first = np.array(data.draw(pos), dtype=np.int32)
    second = np.array(data.draw(pos), dtype=np.int32)
    got = moved_either(first, second, size)
    assert got.dtype == np.int32
    np.testing.assert_array_equal(got, np.union1d(first, second).astype(np.int32))  # reference: numpy.union1d
