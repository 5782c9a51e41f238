"""service/serialize.py: the plan written as finished JSON equals the plain dict encoding."""

from __future__ import annotations

import json

import orjson
from hypothesis import given, settings
from hypothesis import strategies as st

from service.serialize import json_object_map

# names as a model may carry them: any non-empty printable text, quotes, backslashes and commas included
NAMES = st.lists(
    st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=12), unique=True, max_size=40
)
NUMBERS = st.one_of(st.none(), st.floats(allow_nan=False, allow_infinity=False))
STATUSES = st.sampled_from(["basic", "at_lower", "at_upper", "fixed", "free", None])


@settings(max_examples=200, deadline=None)
@given(data=st.data(), names=NAMES)
def test_finished_json_map_equals_the_dict_encoding(data, names):
    values = data.draw(st.lists(NUMBERS, min_size=len(names), max_size=len(names)))
    prices = data.draw(st.lists(NUMBERS, min_size=len(names), max_size=len(names)))
    status = data.draw(st.lists(STATUSES, min_size=len(names), max_size=len(names)))
    fragment = json_object_map(names, (("value", values), ("shadow_price", prices), ("basis", status)))
    expected = {
        name: {"value": v, "shadow_price": p, "basis": s} for name, v, p, s in zip(names, values, prices, status)
    }
    text = orjson.dumps({"map": fragment})
    assert json.loads(text)["map"] == expected
    assert list(json.loads(text)["map"]) == names  # model order kept
    assert text == orjson.dumps({"map": expected})  # byte for byte what orjson writes for the dict


def test_an_empty_map_is_an_empty_object():
    assert orjson.dumps(json_object_map([], (("value", []),))) == b"{}"
