"""MPS files in and out of the engine's LinearProgram.

Reading uses HiGHS's MPS reader (highspy), which handles both the fixed and
the free layout, then converts its model to our arrays. Writing is our own
free-layout writer.

Conventions followed by ``read_mps`` (each checked by tests/lp/test_mps.py):

- Objective constant: an RHS entry on the objective row holds MINUS the
  constant, i.e. objective = c @ x - rhs(objective row). This is what HiGHS
  does (it stores offset = -rhs). For Netlib e226, whose objective row carries
  RHS -7.113, this gives the optimum -11.638929066 listed in
  shared/data/netlib/optimal.csv; ignoring the entry would give c @ x =
  -18.751929066, the value in the published Netlib table. (The shared
  README words this the other way round; the numbers above were measured.)
  Every shared Netlib file reads to the optimum in optimal.csv this way.
- Extra N rows (free rows after the first, which is the objective) are
  dropped, as HiGHS's reader does and as the Netlib table counts rows.
- A negative UP bound on a column with no explicit lower bound makes the
  lower bound -inf (the long-standing MPS convention that several readers
  apply; HiGHS 1.16 keeps lower = 0, which would make such a column
  infeasible). With an explicit LO (or FX/MI/FR) the bounds stay as written.
- Bounds and right-hand sides of magnitude >= 1e20 are infinite (HiGHS).
- RANGES follow the MPS rule: L row [rhs-|R|, rhs], G row [rhs, rhs+|R|],
  E row [rhs, rhs+R] for R > 0 and [rhs+R, rhs] for R < 0.
- Integer markers, integer bound types and quadratic sections are rejected
  with MpsError: the engine solves continuous linear programs only.

Names in free MPS cannot hold whitespace. ``write_mps`` replaces any name
that cannot be written as is (empty, containing whitespace, or duplicated)
by a generated one (``_c<j>`` / ``_r<i>``) and records the original in a
comment line ``* name-map col _c17 "DEDO3 11"`` (JSON string). Other readers
see ordinary comments and the generated names; ``read_mps`` restores the
originals, so ``read_mps(write_mps(lp))`` round-trips names too, except that
a name repeated in the model comes back only once (later copies keep their
generated names): a model read from MPS always has unique names.
"""

from __future__ import annotations

import gzip
import json
import os
import re
import tempfile
import zlib
from pathlib import Path

import highspy
import numpy as np
import scipy.sparse as sp

from .model import MAXIMIZE, MINIMIZE, LinearProgram

# HiGHS treats values at or beyond this as infinite when it reads a model.
_HIGHS_INF = float(highspy.kHighsInf)
_BIG = 1e20
# A free row other than the objective is written as an L row with this RHS:
# readers (HiGHS's included) drop N rows after the first, and >= 1e20 reads
# back as infinite, so the row survives a round trip as a free row.
_FREE_ROW_RHS = "1e+30"
_NAME_MAP_RE = re.compile(rb'^\* name-map (col|row) (\S+) (".*")\s*$', re.MULTILINE)


class MpsError(ValueError):
    """MPS input that cannot be read, or a model that cannot be written."""


# --------------------------------------------------------------------- reading


def read_mps(source: str | bytes | os.PathLike) -> LinearProgram:
    """Read an MPS model (fixed or free layout, optionally gzip-compressed).

    ``source`` is a path (str without a newline, or os.PathLike) or the MPS
    text itself (str with newlines, or bytes, e.g. an HTTP upload). See the
    module docstring for the conventions followed.
    """
    lp, _ = read_mps_report(source)
    return lp


def read_mps_report(
    source: str | bytes | os.PathLike, strict: bool = False
) -> tuple[LinearProgram, list[str]]:
    """Like ``read_mps`` but also return the reader's warnings.

    HiGHS skips some faults with a warning (an entry for an undefined row, a
    duplicate entry); with ``strict=True`` any warning raises MpsError.
    """
    data = _source_bytes(source)
    with tempfile.TemporaryDirectory(prefix="hotbasis-mps-") as tmp:
        model_path = os.path.join(tmp, "model.mps")
        log_path = os.path.join(tmp, "read.log")
        with open(model_path, "wb") as fh:
            fh.write(data)
        h = highspy.Highs()
        h.setOptionValue("output_flag", True)
        h.setOptionValue("log_to_console", False)
        h.setOptionValue("log_file", log_path)
        status = h.readModel(model_path)
        # Closes the log file so it can be read (and the directory removed).
        h.setOptionValue("log_file", "")
        h.setOptionValue("output_flag", False)
        log = Path(log_path).read_text(errors="replace") if os.path.exists(log_path) else ""
        messages = _log_messages(log, model_path)
        if status == highspy.HighsStatus.kError:
            errors = [m for m in messages if m.startswith("ERROR")] or ["the reader rejected the input"]
            raise MpsError("could not read MPS input: " + "; ".join(errors))
        warnings = [m for m in messages if m.startswith("WARNING")]
        if strict and warnings:
            raise MpsError("MPS input has faults: " + "; ".join(warnings))
        hlp = h.getLp()
        model = h.getModel()
    if len(hlp.integrality_) and any(v != highspy.HighsVarType.kContinuous for v in hlp.integrality_):
        raise MpsError("MPS input declares integer variables; only continuous linear programs are supported")
    if model.hessian_.dim_ > 0:
        raise MpsError("MPS input has a quadratic objective; only linear programs are supported")
    lp = _from_highs_lp(hlp)
    lp.name = _model_name(data)
    _bounds_in_order(lp, data)
    _restore_names(lp, data)
    return lp, warnings


def _source_bytes(source: str | bytes | os.PathLike) -> bytes:
    if isinstance(source, bytes | bytearray | memoryview):
        data = bytes(source)
    elif isinstance(source, str) and ("\n" in source or "\r" in source):
        data = source.encode("utf-8")
    elif isinstance(source, str | os.PathLike):
        path = Path(source)
        if not path.is_file():
            raise MpsError(f"MPS file not found: {path}")
        data = path.read_bytes()
    else:
        raise MpsError(f"cannot read MPS from a {type(source).__name__}")
    if data[:2] == b"\x1f\x8b":
        try:
            data = gzip.decompress(data)
        except (OSError, EOFError, zlib.error) as exc:
            raise MpsError(f"MPS input looks gzip-compressed but does not decompress: {exc}") from None
    if not data.strip():
        raise MpsError("MPS input is empty")
    return data


def _log_messages(log: str, model_path: str) -> list[str]:
    out = []
    for line in log.splitlines():
        line = line.strip()
        if line.startswith(("ERROR", "WARNING")):
            line = re.sub(r"\s+", " ", line.replace(model_path, "<input>"))
            out.append(line.replace("ERROR: ", "ERROR ").replace("WARNING: ", "WARNING "))
    return out


def _finite_or_inf(values, sign: float) -> np.ndarray:
    arr = np.asarray(values, dtype=np.float64).copy()
    if sign > 0:
        arr[arr >= min(_HIGHS_INF, _BIG)] = np.inf
    else:
        arr[arr <= -min(_HIGHS_INF, _BIG)] = -np.inf
    return arr


def _from_highs_lp(hlp) -> LinearProgram:
    m, n = int(hlp.num_row_), int(hlp.num_col_)
    mat = hlp.a_matrix_
    start = np.asarray(mat.start_, dtype=np.int64)
    index = np.asarray(mat.index_, dtype=np.int64)
    value = np.asarray(mat.value_, dtype=np.float64)
    if mat.format_ == highspy.MatrixFormat.kRowwise:
        A = sp.csr_matrix((value, index, start), shape=(m, n)).tocsc()
    else:
        if start.size == 0:
            start = np.zeros(n + 1, dtype=np.int64)
        A = sp.csc_matrix((value, index, start), shape=(m, n))
    col_lower = _finite_or_inf(hlp.col_lower_, -1)
    col_upper = _finite_or_inf(hlp.col_upper_, +1)
    sense = MAXIMIZE if hlp.sense_ == highspy.ObjSense.kMaximize else MINIMIZE
    return LinearProgram(
        A=A,
        c=np.asarray(hlp.col_cost_, dtype=np.float64),
        col_lower=col_lower,
        col_upper=col_upper,
        row_lower=_finite_or_inf(hlp.row_lower_, -1),
        row_upper=_finite_or_inf(hlp.row_upper_, +1),
        sense=sense,
        offset=float(hlp.offset_),
        col_names=list(hlp.col_names_) if len(hlp.col_names_) == n else [],
        row_names=list(hlp.row_names_) if len(hlp.row_names_) == m else [],
    )


def _model_name(data: bytes) -> str:
    # HiGHS names the model after the (temporary) file, so take the NAME line.
    match = re.search(rb"^NAME[ \t]*([^\r\n]*)", data, re.MULTILINE)
    return match.group(1).decode("utf-8", errors="replace").strip() if match else ""


def _bounds_in_order(lp: LinearProgram, data: bytes) -> None:
    """Apply the BOUNDS section line by line, in file order, over HiGHS's reading.

    The traditional rules: a column starts at [0, +inf); UP sets the upper bound
    and, when negative with no lower bound given before, makes the lower bound
    -inf; LO, FX, MI (lower -inf), PL (upper +inf) and FR (both infinite) apply
    in order, so "FR then UP 10" gives (-inf, 10]. HiGHS's reader keeps lower 0
    for a negative UP and drops an UP that follows FR; this pass restores both.
    Only the first bound set is read (common practice).
    """
    index = {name: j for j, name in enumerate(lp.col_names)}
    lower: dict[int, float] = {}
    upper: dict[int, float] = {}
    lower_given: set[int] = set()
    in_bounds = False
    bound_set: str | None = None
    for raw in data.decode("utf-8", errors="replace").splitlines():
        if not raw.strip() or raw.startswith("*"):
            continue
        if not raw[0].isspace():
            in_bounds = raw.split()[0].upper() == "BOUNDS"
            continue
        if not in_bounds:
            continue
        tokens = raw.split()
        kind = tokens[0].upper()
        # free layout: type, set, column, value; fixed layout: columns 5-12, 15-22, 25-36
        j, set_name, value_text = None, None, None
        if len(tokens) >= 3 and tokens[2] in index:
            j, set_name = index[tokens[2]], tokens[1]
            value_text = tokens[3] if len(tokens) > 3 else None
        elif raw[14:22].strip() in index:
            j, set_name = index[raw[14:22].strip()], raw[4:12].strip()
            value_text = raw[24:36].strip() or None
        if j is None:
            continue
        if bound_set is None:
            bound_set = set_name
        elif set_name != bound_set:
            continue
        try:
            value = float(value_text) if value_text is not None else None
        except ValueError:
            continue
        lo = lower.get(j, 0.0)
        up = upper.get(j, np.inf)
        if kind == "UP" and value is not None:
            up = value
            if value < 0 and j not in lower_given and lo == 0.0:
                lo = -np.inf
        elif kind == "LO" and value is not None:
            lo = value
            lower_given.add(j)
        elif kind == "FX" and value is not None:
            lo = up = value
            lower_given.add(j)
        elif kind == "MI":
            lo = -np.inf
            lower_given.add(j)
        elif kind == "PL":
            up = np.inf
        elif kind == "FR":
            lo, up = -np.inf, np.inf
            lower_given.add(j)
        else:
            continue
        lower[j], upper[j] = lo, up
    for j, lo in lower.items():
        lp.col_lower[j] = lo
        lp.col_upper[j] = upper[j]


def _restore_names(lp: LinearProgram, data: bytes) -> None:
    """Apply ``* name-map`` comments; a mapping that would duplicate a name is ignored."""
    if b"* name-map " not in data:
        return
    tables = {
        b"col": (lp.col_names, {name: j for j, name in enumerate(lp.col_names)}),
        b"row": (lp.row_names, {name: i for i, name in enumerate(lp.row_names)}),
    }
    taken = {b"col": set(lp.col_names), b"row": set(lp.row_names)}
    for kind, written, original in _NAME_MAP_RE.findall(data):
        try:
            name = json.loads(original.decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            continue
        names, pos = tables[kind]
        k = pos.get(written.decode("utf-8", errors="replace"))
        if not isinstance(name, str) or k is None or names[k] != written.decode() or name in taken[kind]:
            continue
        taken[kind].discard(names[k])
        taken[kind].add(name)
        names[k] = name


# --------------------------------------------------------------------- writing


def _writable(name: str) -> bool:
    return bool(name) and not any(ch.isspace() for ch in name) and not name.startswith(("*", "$"))


def _mps_names(names: list[str], prefix: str, taken: set[str]) -> tuple[list[str], dict[str, str]]:
    """Names safe for free MPS, unique among themselves and against ``taken``."""
    counts: dict[str, int] = {}
    for name in names:
        counts[name] = counts.get(name, 0) + 1
    out: list[str] = []
    mapping: dict[str, str] = {}
    used = set(taken) | {nm for nm in names if _writable(nm) and counts[nm] == 1}
    for k, name in enumerate(names):
        if _writable(name) and counts[name] == 1:
            out.append(name)
            continue
        gen = f"{prefix}{k}"
        while gen in used:
            gen = "_" + gen
        used.add(gen)
        out.append(gen)
        mapping[gen] = name
    return out, mapping


def _num(value: float) -> str:
    # repr gives the shortest text that reads back to the same double.
    return repr(float(value))


def _two_sided(lo: float, up: float) -> tuple[str, float]:
    """Row type and range for lo <= row <= up that reads back exactly if possible.

    A reader computes the far side as rhs - |R| (L row) or rhs + |R| (G row).
    up - lo rounded can miss by an ulp, so nearby R values are tried on both
    kinds; failing all, L with R = up - lo (off by at most a rounding).
    """
    base = up - lo
    candidates = [base]
    for direction in (np.inf, -np.inf):
        r = base
        for _ in range(3):
            r = float(np.nextafter(r, direction))
            candidates.append(r)
    for r in candidates:
        if r > 0 and up - r == lo:
            return "L", r
        if r > 0 and lo + r == up:
            return "G", r
    return "L", base


def write_mps(lp: LinearProgram) -> str:
    """The model as free-layout MPS text; ``read_mps`` reads it back exactly.

    Rows: E for equalities, L / G for one-sided rows, an L or G row plus a
    RANGES entry for two-sided rows (range chosen so that rhs -/+ range gives
    the other side exactly whenever a double allows it), free rows as L with
    RHS 1e+30. Columns: FX, FR, MI (+ UP),
    LO, UP as needed (MI/PL are never ambiguous in what we write: MI always
    comes with an explicit UP when the upper bound is finite, and the default
    upper bound is +inf so PL is never needed). The objective constant goes
    to the objective row's RHS as -offset. Names that free MPS cannot hold
    are replaced (see module docstring).
    """
    row_names, row_map = _mps_names(lp.row_names, "_r", set())
    obj_name = "obj"
    while obj_name in set(row_names):
        obj_name = "_" + obj_name
    col_names, col_map = _mps_names(lp.col_names, "_c", set())

    out: list[str] = []
    model_name = re.sub(r"[\r\n]+", " ", lp.name).strip() or "hotbasis"
    out.append(f"NAME {model_name}")
    if row_map or col_map:
        out.append("* names that free MPS cannot hold were replaced; originals (JSON strings):")
        for gen, orig in col_map.items():
            out.append(f"* name-map col {gen} {json.dumps(orig)}")
        for gen, orig in row_map.items():
            out.append(f"* name-map row {gen} {json.dumps(orig)}")
    if lp.sense == MAXIMIZE:
        out.append("OBJSENSE")
        out.append("    MAX")

    rl, ru = lp.row_lower, lp.row_upper
    row_type: list[str] = []
    rhs: list[tuple[str, float | str]] = []
    ranges: list[tuple[str, float]] = []
    for i in range(lp.m):
        lo, up, nm = rl[i], ru[i], row_names[i]
        lo_fin, up_fin = np.isfinite(lo), np.isfinite(up)
        if lo_fin and up_fin and lo == up:
            row_type.append("E")
            if lo != 0.0:
                rhs.append((nm, lo))
        elif lo_fin and up_fin:
            kind, range_value = _two_sided(lo, up)
            row_type.append(kind)
            side = up if kind == "L" else lo
            if side != 0.0:
                rhs.append((nm, side))
            ranges.append((nm, range_value))
        elif up_fin:
            row_type.append("L")
            if up != 0.0:
                rhs.append((nm, up))
        elif lo_fin:
            row_type.append("G")
            if lo != 0.0:
                rhs.append((nm, lo))
        else:
            row_type.append("L")
            rhs.append((nm, _FREE_ROW_RHS))

    out.append("ROWS")
    out.append(f" N {obj_name}")
    for t, nm in zip(row_type, row_names):
        out.append(f" {t} {nm}")

    out.append("COLUMNS")
    A = lp.A.copy()
    A.eliminate_zeros()
    indptr, indices, data = A.indptr, A.indices, A.data
    for j in range(lp.n):
        cname = col_names[j]
        # Every column gets an objective entry (0 if need be) so a column
        # without nonzeros is still declared.
        out.append(f"    {cname} {obj_name} {_num(lp.c[j])}")
        for k in range(indptr[j], indptr[j + 1]):
            out.append(f"    {cname} {row_names[indices[k]]} {_num(data[k])}")

    out.append("RHS")
    if lp.offset != 0.0:
        out.append(f"    RHS {obj_name} {_num(-lp.offset)}")
    for nm, val in rhs:
        out.append(f"    RHS {nm} {val if isinstance(val, str) else _num(val)}")

    if ranges:
        out.append("RANGES")
        for nm, val in ranges:
            out.append(f"    RNG {nm} {_num(val)}")

    bounds: list[str] = []
    for j in range(lp.n):
        lo, up, nm = lp.col_lower[j], lp.col_upper[j], col_names[j]
        lo_fin, up_fin = np.isfinite(lo), np.isfinite(up)
        if lo_fin and up_fin and lo == up:
            bounds.append(f" FX BND {nm} {_num(lo)}")
        elif not lo_fin and not up_fin:
            bounds.append(f" FR BND {nm}")
        elif not lo_fin:
            bounds.append(f" MI BND {nm}")
            bounds.append(f" UP BND {nm} {_num(up)}")
        else:
            # LO is written whenever UP < 0 too, so no reader applies the
            # negative-UP rule to a column whose lower bound is really 0.
            if lo != 0.0 or (up_fin and up < 0.0):
                bounds.append(f" LO BND {nm} {_num(lo)}")
            if up_fin:
                bounds.append(f" UP BND {nm} {_num(up)}")
    if bounds:
        out.append("BOUNDS")
        out.extend(bounds)
    out.append("ENDATA")
    return "\n".join(out) + "\n"
