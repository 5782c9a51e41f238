"""The plan encoder (service/plan_json.py) writes exactly what orjson writes for the dict form.

Reference: orjson.dumps of the plain dict-of-dicts (the way the plan was built before the
encoder existed), compared byte for byte, and json.loads of the result.
"""

from __future__ import annotations

import json

import numpy as np
import orjson
import pytest

from service.plan_json import plan_object

KEYS = ("value", "reduced_cost", "basis")
WORDS = ["basic", "at_lower", "at_upper", "fixed", "free"]
AWKWARD = [
    'quote"inside', "back\\slash", "ends with backslash\\", '","', '":', "{}[],:", "tab\there", "new\nline",
    "bell\x07", "del\x7f", "naïve/µ", "日本語", "emoji 🚚", "\u2028sep", "x" * 300, "a,b", " ", "null", "1e5",
]  # fmt: skip


def reference(names, first, second, codes, words):
    def plain(v):
        if v is None:
            return None
        return [None if not np.isfinite(x) else float(x) for x in v]

    a = plain(first) or [None] * len(names)
    b = plain(second) or [None] * len(names)
    return orjson.dumps(
        {n: {KEYS[0]: x, KEYS[1]: y, KEYS[2]: words[c]} for n, x, y, c in zip(names, a, b, codes)}
    )


def encoded(names, first, second, codes, words):
    return orjson.dumps(plan_object(names, KEYS, first, second, np.asarray(codes), words))


@pytest.mark.parametrize("seed", range(6))
def test_same_bytes_as_the_dict_form(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 400))
    names = [f"{rng.choice(AWKWARD)}#{j}" if rng.random() < 0.5 else f"lane_{j}" for j in range(n)]
    special = np.array([0.0, -0.0, 5e-324, 1e-300, 1.7976931348623157e308, 1e16, 0.1, 1 / 3, np.nan, np.inf, -np.inf])
    first = np.where(rng.random(n) < 0.2, rng.choice(special, n), rng.standard_normal(n) * 10.0 ** rng.integers(-20, 20, n))
    second = rng.integers(-1000, 1000, n).astype(float)
    codes = rng.integers(0, 5, n)
    got = encoded(names, first, second, codes, WORDS)
    assert got == reference(names, first, second, codes, WORDS)
    back = json.loads(got)
    assert list(back) == names
    assert [e["basis"] for e in back.values()] == [WORDS[c] for c in codes]


def test_missing_arrays_and_statuses_are_null():
    names = ["a", 'b"', "c\\"]
    got = encoded(names, None, np.array([1.0, 2.0, 3.0]), [0, 0, 0], [None])
    assert got == reference(names, None, np.array([1.0, 2.0, 3.0]), [0, 0, 0], [None])
    assert json.loads(got)['b"'] == {"value": None, "reduced_cost": 2.0, "basis": None}


def test_empty_plan():
    assert encoded([], np.zeros(0), np.zeros(0), [], WORDS) == b"{}"


def test_inside_a_larger_answer():
    names = ["x1", "x2"]
    frag = plan_object(names, KEYS, np.array([1.5, 0.0]), np.array([0.0, -2.0]), np.array([0, 1]), WORDS)
    body = orjson.dumps({"id": "m", "solution": {"variables": frag, "constraints": frag}})
    assert json.loads(body)["solution"]["variables"]["x2"] == {"value": 0.0, "reduced_cost": -2.0, "basis": "at_lower"}


def test_lengths_must_match_the_names():
    with pytest.raises(ValueError, match="first has 2 entries for 3 names"):
        plan_object(["a", "b", "c"], KEYS, np.ones(2), None, np.zeros(3, np.int64), ["w"])
    with pytest.raises(ValueError, match="codes"):
        plan_object(["a"], KEYS, np.ones(1), None, np.zeros(2, np.int64), ["w"])
