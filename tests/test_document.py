"""The model document: validation with JSON pointers, conversion, merge patch, change classification."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.document import (
    DocumentError,
    apply_patch,
    from_document,
    lp_check,
    merge_document,
    merge_patch,
    pointer,
    to_document,
)
from service.lp.model import MAXIMIZE, MINIMIZE

DEPOT = {
    "name": "depot",
    "sense": "max",
    "variables": {
        "bikes": {"cost": 30, "upper": 40},
        "carts": {"cost": 50},
        "spare": {},
    },
    "constraints": {
        "assembly_hours": {"terms": {"bikes": 2, "carts": 3}, "upper": 120},
        "paint_hours": {"terms": {"bikes": 1, "carts": 2, "spare": 0}, "lower": 0, "upper": 70},
    },
}


def pointers(exc: DocumentError) -> set[str]:
    return {e.pointer for e in exc.errors}


def test_from_document_builds_arrays_with_defaults():
    lp = from_document(DEPOT)
    assert lp.sense == MAXIMIZE and lp.name == "depot" and lp.offset == 0.0
    assert lp.col_names == ["bikes", "carts", "spare"]
    assert lp.row_names == ["assembly_hours", "paint_hours"]
    np.testing.assert_array_equal(lp.c, [30, 50, 0])
    np.testing.assert_array_equal(lp.col_lower, [0, 0, 0])  # default lower bound 0
    np.testing.assert_array_equal(lp.col_upper, [40, np.inf, np.inf])  # default upper: unbounded
    np.testing.assert_array_equal(lp.row_lower, [-np.inf, 0])
    np.testing.assert_array_equal(lp.A.toarray(), [[2, 3, 0], [1, 2, 0]])
    assert lp.A.nnz == 4  # the zero coefficient on "spare" is no entry


def test_document_round_trip_is_stable():
    doc = to_document(from_document(DEPOT))
    assert doc["variables"]["bikes"] == {"cost": 30.0, "lower": 0.0, "upper": 40.0}
    assert doc["variables"]["spare"]["upper"] is None
    assert doc["constraints"]["assembly_hours"]["lower"] is None
    assert doc["constraints"]["paint_hours"]["terms"] == {"bikes": 1.0, "carts": 2.0}
    assert to_document(from_document(doc)) == doc


def test_null_lower_bound_means_unbounded_below():
    lp = from_document({"variables": {"balance": {"lower": None, "upper": 5}}})
    assert lp.col_lower[0] == -np.inf and lp.col_upper[0] == 5


@pytest.mark.parametrize(
    "doc, expected_pointer",
    [
        ({"variables": {"x": {"cost": float("nan")}}}, "/variables/x/cost"),
        ({"variables": {"x": {"upper": float("inf")}}}, "/variables/x/upper"),
        ({"variables": {"x": {"cost": 10**400}}}, "/variables/x/cost"),
        ({"variables": {"x": {"cost": True}}}, "/variables/x/cost"),
        ({"variables": {"x": {"cost": "5"}}}, "/variables/x/cost"),
        ({"variables": {"x": {"lower": 3, "upper": 2}}}, "/variables/x/lower"),
        ({"variables": {"x": {}}, "constraints": {"c": {"lower": 9, "upper": 1}}}, "/constraints/c/lower"),
        ({"variables": {"x": {}}, "constraints": {"c": {"terms": {"y": 1}}}}, "/constraints/c/terms/y"),
        ({"sense": "maximize", "variables": {"x": {}}}, "/sense"),
        ({"variables": {"x": {"price": 1}}}, "/variables/x/price"),
        ({"colour": "red", "variables": {"x": {}}}, "/colour"),
        ({"variables": {"bad\nname": {}}}, "/variables/bad\nname"),
        ({"variables": {"": {}}}, "/variables/"),
        ({"variables": {}}, "/variables"),
        ({"variables": []}, "/variables"),
        ({"variables": {"x": 5}}, "/variables/x"),
        ([1, 2], ""),
    ],
)
def test_invalid_documents_point_at_the_field(doc, expected_pointer):
    with pytest.raises(DocumentError) as info:
        from_document(doc)
    assert expected_pointer in pointers(info.value)


def test_pointer_escapes_slash_and_tilde():
    # RFC 6901 section 3: "~" is written "~0" and "/" is written "~1"
    assert pointer("constraints", "a/b~c", "terms") == "/constraints/a~1b~0c/terms"
    with pytest.raises(DocumentError) as info:
        from_document({"variables": {"x/y": {"cost": "x"}}})
    assert "/variables/x~1y/cost" in pointers(info.value)


def test_every_error_is_reported_not_only_the_first():
    with pytest.raises(DocumentError) as info:
        from_document({"variables": {"a": {"cost": "x"}, "b": {"lower": 5, "upper": 1}}, "sense": 3})
    assert {"/variables/a/cost", "/variables/b/lower", "/sense"} <= pointers(info.value)


# RFC 7396 Appendix A test cases (target, patch, result), copied from the RFC's table
RFC7396_CASES = [
    ({"a": "b"}, {"a": "c"}, {"a": "c"}),
    ({"a": "b"}, {"b": "c"}, {"a": "b", "b": "c"}),
    ({"a": "b"}, {"a": None}, {}),
    ({"a": "b", "b": "c"}, {"a": None}, {"b": "c"}),
    ({"a": ["b"]}, {"a": "c"}, {"a": "c"}),
    ({"a": "c"}, {"a": ["b"]}, {"a": ["b"]}),
    ({"a": {"b": "c"}}, {"a": {"b": "d", "c": None}}, {"a": {"b": "d"}}),
    ({"a": [{"b": "c"}]}, {"a": [1]}, {"a": [1]}),
    (["a", "b"], ["c", "d"], ["c", "d"]),
    ({"a": "b"}, ["c"], ["c"]),
    ({"a": "foo"}, None, None),
    ({"a": "foo"}, "bar", "bar"),
    ({"e": None}, {"a": 1}, {"e": None, "a": 1}),
    ([1, 2], {"a": "b", "c": None}, {"a": "b"}),
    ({}, {"a": {"bb": {"ccc": None}}}, {"a": {"bb": {}}}),
]


@pytest.mark.parametrize("target, patch, result", RFC7396_CASES)
def test_merge_patch_matches_rfc7396_appendix_a(target, patch, result):
    assert merge_patch(target, patch) == result


def test_apply_patch_adds_a_constraint_and_classifies_it_dual():
    lp = from_document(DEPOT)
    new, changes = apply_patch(lp, {"constraints": {"crate_limit": {"terms": {"carts": 1}, "upper": 20}}})
    assert new.row_names[-1] == "crate_limit" and new.m == 3
    np.testing.assert_array_equal(new.A.toarray()[2], [0, 1, 0])
    assert changes.rows_added == ["crate_limit"] and changes.kind() == "dual"
    assert lp.m == 2  # the stored model is untouched
    assert changes.row_source.tolist() == [0, 1, -1] and changes.col_source.tolist() == [0, 1, 2]


def test_apply_patch_adds_a_variable_and_classifies_it_primal():
    lp = from_document(DEPOT)
    patch = {
        "variables": {"trikes": {"cost": 45}},
        "constraints": {"assembly_hours": {"terms": {"trikes": 2.5}}},
    }
    new, changes = apply_patch(lp, patch)
    assert new.col_names == ["bikes", "carts", "spare", "trikes"]
    np.testing.assert_array_equal(new.A.toarray()[0], [2, 3, 0, 2.5])
    assert changes.columns_added == ["trikes"] and changes.coefficients == ["assembly_hours"]
    assert changes.kind() == "both"
    new2, changes2 = apply_patch(lp, {"variables": {"trikes": {"cost": 45}}})
    assert changes2.kind() == "primal" and new2.A[:, 3].nnz == 0


def test_apply_patch_removals_bounds_and_costs():
    lp = from_document(DEPOT)
    new, changes = apply_patch(
        lp,
        {
            "constraints": {"paint_hours": None, "assembly_hours": {"upper": 100, "terms": {"bikes": None}}},
            "variables": {"bikes": {"lower": None, "cost": None}, "spare": None},
            "sense": None,
            "objective_offset": 7,
        },
    )
    assert new.row_names == ["assembly_hours"] and new.col_names == ["bikes", "carts"]
    assert new.row_upper[0] == 100 and new.col_lower[0] == -np.inf and new.c[0] == 0
    np.testing.assert_array_equal(new.A.toarray(), [[0, 3]])
    assert new.sense == MINIMIZE and new.offset == 7
    assert changes.rows_removed == ["paint_hours"] and changes.columns_removed == ["spare"]
    assert changes.row_bounds == ["assembly_hours"] and changes.coefficients == ["assembly_hours"]
    assert changes.column_bounds == ["bikes"] and changes.costs == ["bikes"]
    assert changes.sense and changes.objective_offset
    assert changes.col_source.tolist() == [0, 1] and changes.row_source.tolist() == [0]


def test_apply_patch_that_changes_nothing_is_empty():
    lp = from_document(DEPOT)
    _new, changes = apply_patch(lp, {"variables": {"bikes": {"cost": 30}}, "constraints": {"gone": None}})
    assert changes.empty() and changes.kind() == "none"


@pytest.mark.parametrize(
    "patch, expected_pointer",
    [
        ({"variables": {"carts": None}}, "/variables/carts"),  # still used by two constraints
        ({"variables": {"bikes": {"lower": 50}}}, "/variables/bikes/lower"),  # above its upper bound 40
        ({"constraints": {"c": {"terms": {"ghost": 1}}}}, "/constraints/c/terms/ghost"),
        ({"constraints": {"paint_hours": {"upper": float("nan")}}}, "/constraints/paint_hours/upper"),
        ({"constraints": {"paint_hours": 3}}, "/constraints/paint_hours"),
        ({"variables": None}, "/variables"),
        ({"fleet": 1}, "/fleet"),
        ("replace everything", ""),
    ],
)
def test_apply_patch_rejects_invalid_results(patch, expected_pointer):
    lp = from_document(DEPOT)
    with pytest.raises(DocumentError) as info:
        apply_patch(lp, patch)
    assert expected_pointer in pointers(info.value)


def test_lp_check_applies_document_rules_to_models_from_elsewhere():
    lp = from_document(DEPOT)
    lp.col_names[1] = "bikes"
    lp.col_lower[0] = 50  # above the upper bound of 40
    with pytest.raises(DocumentError) as info:
        lp_check(lp)
    assert {"/variables/bikes", "/variables/bikes/lower"} <= pointers(info.value)


# ---- property: the array path and the document path agree on every patch

NAMES = st.sampled_from(["a", "b", "c", "d", "e"])
NUMBER = st.one_of(st.integers(-5, 5), st.floats(-10, 10, allow_nan=False))
MAYBE_NUMBER = st.one_of(st.none(), NUMBER)
VAR_PATCH = st.one_of(
    st.none(),
    st.fixed_dictionaries({}, optional={"cost": MAYBE_NUMBER, "lower": MAYBE_NUMBER, "upper": MAYBE_NUMBER}),
)
TERMS = st.one_of(st.none(), st.dictionaries(NAMES, MAYBE_NUMBER, max_size=3))
CON_PATCH = st.one_of(
    st.none(),
    st.fixed_dictionaries({}, optional={"terms": TERMS, "lower": MAYBE_NUMBER, "upper": MAYBE_NUMBER}),
)
ROWS = st.sampled_from(["r1", "r2", "r3", "r4"])
PATCH = st.fixed_dictionaries(
    {},
    optional={
        "variables": st.dictionaries(NAMES, VAR_PATCH, max_size=3),
        "constraints": st.dictionaries(ROWS, CON_PATCH, max_size=3),
        "sense": st.sampled_from([None, "min", "max"]),
        "objective_offset": MAYBE_NUMBER,
    },
)
BASE = {
    "sense": "min",
    "variables": {"a": {"cost": 1, "upper": 4}, "b": {"cost": -2, "lower": None}, "c": {}},
    "constraints": {
        "r1": {"terms": {"a": 1, "b": 2}, "upper": 10},
        "r2": {"terms": {"b": -1, "c": 3}, "lower": -2, "upper": 8},
    },
}


def same_lp(x, y) -> bool:
    return (
        x.col_names == y.col_names
        and x.row_names == y.row_names
        and x.sense == y.sense
        and math.isclose(x.offset, y.offset)
        and np.array_equal(x.c, y.c)
        and np.array_equal(x.col_lower, y.col_lower)
        and np.array_equal(x.col_upper, y.col_upper)
        and np.array_equal(x.row_lower, y.row_lower)
        and np.array_equal(x.row_upper, y.row_upper)
        and np.array_equal(x.A.toarray(), y.A.toarray())
    )


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(PATCH)
def test_array_patch_agrees_with_document_patch(patch):
    lp = from_document(BASE)
    try:
        fast, _ = apply_patch(lp, patch)
    except DocumentError:
        fast = None
    try:
        slow = from_document(merge_document(to_document(lp), patch))
    except DocumentError:
        slow = None
    assert (fast is None) == (slow is None)
    if fast is not None:
        assert same_lp(fast, slow)
