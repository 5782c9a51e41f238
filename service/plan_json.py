"""The plan by name as JSON bytes, assembled by a compiled loop.

A whole plan at 10,000 rows is ~59,000 entries of the form

    "<name>":{"value":<number>,"reduced_cost":<number>,"basis":"<status>"}

Built as Python dicts and then encoded, it took ~25 ms for the dicts and
~6 ms for orjson. Here orjson encodes each column of the plan once (the
names as one list, each number array as one numpy array: the same float
formatting as for Python floats, null for non-finite values), a compiled
scan finds where each element of those encodings starts and ends, and a
compiled loop copies the pieces into place. The result goes into the
response as an ``orjson.Fragment`` and is byte for byte what
``orjson.dumps`` writes for the dict form (tests/test_plan_json.py checks
that on awkward names and numbers).
"""

from __future__ import annotations

import numba
import numpy as np
import orjson

_JIT = {"cache": True, "nogil": True}
_u = np.uint64  # unsigned positions: no negative-index check per byte (see service/lp/kernels.py)
_QUOTE, _BACKSLASH, _COMMA, _OPEN, _CLOSE = (ord(c) for c in '"\\,[]')


@numba.njit(**_JIT)
def _string_tokens(buf, count):
    """Start and end (exclusive) of each string in a JSON array of strings,
    quotes included; a quote inside a string is always escaped."""
    starts = np.empty(count, np.int64)
    ends = np.empty(count, np.int64)
    k = 0
    inside = False
    i = 0
    while i < buf.size:
        c = buf[i]
        if inside:
            if c == _BACKSLASH:
                i += 1  # the escaped byte cannot end the string
            elif c == _QUOTE:
                ends[k] = i + 1
                k += 1
                inside = False
        elif c == _QUOTE:
            starts[k] = i
            inside = True
        i += 1
    return starts, ends


@numba.njit(**_JIT)
def _number_tokens(buf, count):
    """Start and end (exclusive) of each element of a JSON array of numbers
    and nulls (no element contains a comma)."""
    starts = np.empty(count, np.int64)
    ends = np.empty(count, np.int64)
    k = 0
    start = 1  # after "["
    for i in range(1, buf.size):
        c = buf[i]
        if c == _COMMA or c == _CLOSE:
            if k < count:
                starts[k] = start
                ends[k] = i
            k += 1
            start = i + 1
    return starts, ends


@numba.njit(inline="always", **_JIT)
def _put(out, p, src, start, end):
    """Copy src[start:end] to out at p; return the position after it."""
    for i in range(_u(start), _u(end)):
        out[p] = src[i]
        p += _u(1)
    return p


@numba.njit(**_JIT)
def _assemble(names, ns, ne, a, as_, ae, b, bs, be, codes, words, ws, we, key_a, key_b, key_c):
    """{NAME:{KEY_A A,KEY_B B,KEY_C WORD},...} from the pieces (key_a holds
    '{"value":' and the like; WORD is words[ws[code]:we[code]])."""
    n = ns.size
    total = 2 + (n - 1 if n > 0 else 0)
    fixed = key_a.size + key_b.size + key_c.size + 2  # the keys, ":" after the name, "}" after the entry
    for j in range(n):
        c = _u(codes[j])
        total += (ne[j] - ns[j]) + (ae[j] - as_[j]) + (be[j] - bs[j]) + (we[c] - ws[c]) + fixed
    out = np.empty(total, np.uint8)
    out[0] = ord("{")
    p = _u(1)
    for j in range(n):
        if j > 0:
            out[p] = _COMMA
            p += _u(1)
        p = _put(out, p, names, ns[j], ne[j])
        out[p] = ord(":")
        p += _u(1)
        p = _put(out, p, key_a, 0, key_a.size)
        p = _put(out, p, a, as_[j], ae[j])
        p = _put(out, p, key_b, 0, key_b.size)
        p = _put(out, p, b, bs[j], be[j])
        p = _put(out, p, key_c, 0, key_c.size)
        c = _u(codes[j])
        p = _put(out, p, words, ws[c], we[c])
        out[p] = ord("}")
        p += _u(1)
    out[p] = ord("}")
    return out


def _bytes(data: bytes) -> np.ndarray:
    return np.frombuffer(data, dtype=np.uint8)


def _numbers(values: np.ndarray | None, count: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if values is None:
        values = np.full(count, np.nan)  # written as null
    buf = _bytes(orjson.dumps(np.ascontiguousarray(values, dtype=np.float64), option=orjson.OPT_SERIALIZE_NUMPY))
    starts, ends = _number_tokens(buf, count)
    return buf, starts, ends


def plan_object(
    names: list[str],
    keys: tuple[str, str, str],
    first: np.ndarray | None,
    second: np.ndarray | None,
    codes: np.ndarray,
    words: list[str | None],
) -> orjson.Fragment:
    """``{name: {keys[0]: first[j], keys[1]: second[j], keys[2]: words[codes[j]]}}`` as
    orjson would encode it, in the order of ``names`` (which must be distinct).
    ``first``/``second``: float arrays (non-finite -> null) or None (all null)."""
    count = len(names)
    for what, arr in (("first", first), ("second", second), ("codes", codes)):
        if arr is not None and len(arr) != count:  # the compiled loop reads by position, unchecked
            raise ValueError(f"plan_object: {what} has {len(arr)} entries for {count} names")
    name_buf = _bytes(orjson.dumps(names))
    ns, ne = _string_tokens(name_buf, count)
    a, a_s, a_e = _numbers(first, count)
    b, b_s, b_e = _numbers(second, count)
    pieces = [orjson.dumps(w) for w in words]
    word_buf = _bytes(b"".join(pieces))
    we = np.cumsum([len(p) for p in pieces]).astype(np.int64)
    ws = we - np.array([len(p) for p in pieces], dtype=np.int64)
    key_bytes = [
        _bytes(b"{" + orjson.dumps(keys[0]) + b":"),
        _bytes(b"," + orjson.dumps(keys[1]) + b":"),
        _bytes(b"," + orjson.dumps(keys[2]) + b":"),
    ]
    out = _assemble(
        name_buf, ns, ne, a, a_s, a_e, b, b_s, b_e, np.ascontiguousarray(codes, dtype=np.int64),
        word_buf, ws, we, *key_bytes,
    )  # fmt: skip
    return orjson.Fragment(out.tobytes())


def warm_up() -> None:
    """Compile (or load from the cache) the loops on a tiny plan."""
    plan_object(["a"], ("x", "y", "z"), np.ones(1), None, np.zeros(1, dtype=np.int64), ["w"])
