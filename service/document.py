"""The model document (JSON) and its bridge to the engine's LinearProgram.

The document is what clients send and read::

    {"name": "...", "sense": "min" | "max", "objective_offset": 0,
     "variables":   {"<name>": {"cost": 0, "lower": 0, "upper": null}},
     "constraints": {"<name>": {"terms": {"<variable>": 1.5}, "lower": null, "upper": 40}}}

Defaults: cost 0, variable lower 0, every other bound null; null means
unbounded on that side. Coefficients of zero are the same as no term.

Changes arrive as RFC 7396 merge patches. One reading is ours and documented:
a ``null`` on a ``lower`` or ``upper`` bound means "unbounded on that side",
the meaning null has everywhere in the document. Read literally, RFC 7396 would
delete the key and so bring back the default lower bound of 0, leaving no way
to free a variable's lower bound by patch. Everywhere else null deletes.

Two paths apply a patch and must agree (a property test checks it):
``merge_document`` works on the whole JSON document (simple, slow for big
models); ``apply_patch`` works on the LinearProgram's arrays and touches only
what the patch names, so a one-row change to a 10,000-row model stays cheap.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp

from service.lp.model import MAXIMIZE, MINIMIZE, LinearProgram

DOC_KEYS = ("name", "sense", "objective_offset", "variables", "constraints")
VAR_KEYS = ("cost", "lower", "upper")
CON_KEYS = ("terms", "lower", "upper")
BOUND_KEYS = ("lower", "upper")
MAX_NAME_LENGTH = 255
MAX_TITLE_LENGTH = 1000
MAX_ERRORS = 50  # errors reported per request; the rest are counted
LIST_CAP = 100  # names listed per kind of change in a change summary


@dataclass
class FieldError:
    """One offending field: a JSON pointer into the request body and what is wrong."""

    pointer: str
    detail: str

    def as_dict(self) -> dict[str, str]:
        return {"pointer": self.pointer, "detail": self.detail}


class DocumentError(ValueError):
    """A document or patch that cannot be accepted; carries every field error found."""

    def __init__(self, errors: list[FieldError], title: str = "The model document is not valid") -> None:
        super().__init__("; ".join(f"{e.pointer or '/'}: {e.detail}" for e in errors[:5]))
        self.errors = errors
        self.title = title


def pointer(*parts: str) -> str:
    """An RFC 6901 JSON pointer from unescaped reference tokens."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in parts)


class _Errors:
    """Collects field errors, stops collecting after MAX_ERRORS."""

    def __init__(self) -> None:
        self.items: list[FieldError] = []
        self.dropped = 0

    def add(self, ptr: str, detail: str) -> None:
        if len(self.items) < MAX_ERRORS:
            self.items.append(FieldError(ptr, detail))
        else:
            self.dropped += 1

    def raise_if_any(self, title: str = "The model document is not valid") -> None:
        if self.items:
            if self.dropped:
                self.items.append(FieldError("", f"{self.dropped} more errors not listed"))
            raise DocumentError(self.items, title)


def _number(value: Any, ptr: str, errs: _Errors) -> float | None:
    """A finite float, or None after recording an error (booleans are not numbers)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        errs.add(ptr, "must be a number")
        return None
    try:
        out = float(value)
    except OverflowError:
        out = math.inf
    if not math.isfinite(out):
        errs.add(ptr, "must be a finite number")
        return None
    return out


def _bound(value: Any, ptr: str, errs: _Errors, infinite: float) -> float | None:
    """A bound: null is unbounded (returned as +-inf); None means an error was recorded."""
    if value is None:
        return infinite
    return _number(value, ptr, errs)


def check_name(name: Any, ptr: str, errs: _Errors) -> bool:
    if not isinstance(name, str) or not name:
        errs.add(ptr, "a name must be non-empty text")
        return False
    if len(name) > MAX_NAME_LENGTH:
        errs.add(ptr, f"a name may have at most {MAX_NAME_LENGTH} characters")
        return False
    if not name.isprintable():
        errs.add(ptr, "a name must be printable text (no control characters or line breaks)")
        return False
    return True


def _sense(value: Any, ptr: str, errs: _Errors) -> int | None:
    if value == "min":
        return MINIMIZE
    if value == "max":
        return MAXIMIZE
    errs.add(ptr, 'must be "min" or "max"')
    return None


def _title(value: Any, ptr: str, errs: _Errors) -> str | None:
    if not isinstance(value, str):
        errs.add(ptr, "must be text")
        return None
    if len(value) > MAX_TITLE_LENGTH:
        errs.add(ptr, f"may have at most {MAX_TITLE_LENGTH} characters")
        return None
    return value


def _unknown_keys(obj: dict, allowed: tuple[str, ...], base: tuple[str, ...], errs: _Errors) -> None:
    for key in obj:
        if key not in allowed:
            errs.add(pointer(*base, key), f"unknown field; expected one of {', '.join(allowed)}")


# --------------------------------------------------------------------------------------------
# Whole documents
# --------------------------------------------------------------------------------------------


def from_document(doc: Any) -> LinearProgram:
    """Validate a model document and build the engine's LinearProgram from it.

    Raises DocumentError listing every offending field by JSON pointer.
    """
    errs = _Errors()
    if not isinstance(doc, dict):
        errs.add("", "a model document must be a JSON object")
        errs.raise_if_any()
    _unknown_keys(doc, DOC_KEYS, (), errs)
    name = ""
    if doc.get("name") is not None:
        name = _title(doc["name"], "/name", errs) or ""
    sense = MINIMIZE
    if doc.get("sense") is not None:
        sense = _sense(doc["sense"], "/sense", errs) or MINIMIZE
    offset = 0.0
    if doc.get("objective_offset") is not None:
        offset = _number(doc["objective_offset"], "/objective_offset", errs) or 0.0

    variables = doc.get("variables")
    if variables is None:
        variables = {}
    if not isinstance(variables, dict):
        errs.add("/variables", "must be an object mapping variable names to variables")
        variables = {}
    if not variables:
        errs.add("/variables", "a model needs at least one variable")
    n = len(variables)
    col_names: list[str] = []
    col_index: dict[str, int] = {}
    c = np.zeros(n)
    col_lower = np.zeros(n)
    col_upper = np.full(n, np.inf)
    for j, (vname, var) in enumerate(variables.items()):
        base = ("variables", vname)
        check_name(vname, pointer(*base), errs)
        col_names.append(vname)
        col_index[vname] = j
        if not isinstance(var, dict):
            errs.add(pointer(*base), "a variable must be an object with cost, lower, upper")
            continue
        _unknown_keys(var, VAR_KEYS, base, errs)
        cost, lo, up = _variable_fields(var, base, errs)
        c[j], col_lower[j], col_upper[j] = cost, lo, up

    constraints = doc.get("constraints")
    if constraints is None:
        constraints = {}
    if not isinstance(constraints, dict):
        errs.add("/constraints", "must be an object mapping constraint names to constraints")
        constraints = {}
    m = len(constraints)
    row_names: list[str] = []
    row_lower = np.full(m, -np.inf)
    row_upper = np.full(m, np.inf)
    rows: list[int] = []
    cols: list[int] = []
    vals: list[float] = []
    for i, (cname, con) in enumerate(constraints.items()):
        base = ("constraints", cname)
        check_name(cname, pointer(*base), errs)
        row_names.append(cname)
        if not isinstance(con, dict):
            errs.add(pointer(*base), "a constraint must be an object with terms, lower, upper")
            continue
        _unknown_keys(con, CON_KEYS, base, errs)
        lo, up = _constraint_bounds(con, base, errs)
        row_lower[i], row_upper[i] = lo, up
        terms = con.get("terms")
        if terms is None:
            continue
        if not isinstance(terms, dict):
            errs.add(pointer(*base, "terms"), "must be an object mapping variable names to coefficients")
            continue
        for vname, coef in terms.items():
            ptr = pointer(*base, "terms", vname)
            value = _number(coef, ptr, errs)
            j = col_index.get(vname)
            if j is None:
                errs.add(ptr, "names a variable that is not in the model")
                continue
            if value:  # zero or error: no entry
                rows.append(i)
                cols.append(j)
                vals.append(value)
    errs.raise_if_any()
    A = sp.csc_matrix(
        (np.asarray(vals, dtype=float), (np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64))),
        shape=(m, n),
    )
    return LinearProgram(
        A=A,
        c=c,
        col_lower=col_lower,
        col_upper=col_upper,
        row_lower=row_lower,
        row_upper=row_upper,
        sense=sense,
        offset=offset,
        col_names=col_names,
        row_names=row_names,
        name=name,
    )


def _variable_fields(var: dict, base: tuple[str, ...], errs: _Errors) -> tuple[float, float, float]:
    cost = 0.0
    if var.get("cost") is not None:
        cost = _number(var["cost"], pointer(*base, "cost"), errs) or 0.0
    lo = _bound(var.get("lower", 0.0), pointer(*base, "lower"), errs, -np.inf)
    up = _bound(var.get("upper"), pointer(*base, "upper"), errs, np.inf)
    if lo is not None and up is not None and lo > up:
        errs.add(pointer(*base, "lower"), f"lower bound {_fmt(lo)} exceeds upper bound {_fmt(up)}")
    return cost, (0.0 if lo is None else lo), (np.inf if up is None else up)


def _constraint_bounds(con: dict, base: tuple[str, ...], errs: _Errors) -> tuple[float, float]:
    lo = _bound(con.get("lower"), pointer(*base, "lower"), errs, -np.inf)
    up = _bound(con.get("upper"), pointer(*base, "upper"), errs, np.inf)
    if lo is not None and up is not None and lo > up:
        errs.add(pointer(*base, "lower"), f"lower bound {_fmt(lo)} exceeds upper bound {_fmt(up)}")
    return (-np.inf if lo is None else lo), (np.inf if up is None else up)


def _moved_bound(patch: dict) -> str:
    """The bound a crossing is blamed on: the one the patch sent (lower when it sent both or neither)."""
    return "upper" if "upper" in patch and "lower" not in patch else "lower"


def _fmt(x: float) -> str:
    return f"{x:g}"


def _json_bound(x: float) -> float | None:
    return None if not math.isfinite(x) else float(x)


def to_document(lp: LinearProgram) -> dict[str, Any]:
    """The JSON document of a LinearProgram (bounds at infinity become null)."""
    variables = {
        name: {"cost": cost, "lower": _json_bound(lo), "upper": _json_bound(up)}
        for name, cost, lo, up in zip(
            lp.col_names, lp.c.tolist(), lp.col_lower.tolist(), lp.col_upper.tolist()
        )
    }
    csr = lp.A.tocsr()
    csr.sort_indices()
    indptr, indices, data = csr.indptr, csr.indices, csr.data.tolist()
    col_names = lp.col_names
    constraints = {}
    for i, (name, lo, up) in enumerate(zip(lp.row_names, lp.row_lower.tolist(), lp.row_upper.tolist())):
        start, stop = indptr[i], indptr[i + 1]
        terms = {
            col_names[j]: data[k] for k, j in zip(range(start, stop), indices[start:stop].tolist()) if data[k]
        }
        constraints[name] = {"terms": terms, "lower": _json_bound(lo), "upper": _json_bound(up)}
    return {
        "name": lp.name,
        "sense": "max" if lp.sense == MAXIMIZE else "min",
        "objective_offset": float(lp.offset),
        "variables": variables,
        "constraints": constraints,
    }


def lp_check(lp: LinearProgram) -> None:
    """Apply the document's rules to a model that did not come from a document (MPS).

    Names must be valid document names, and every lower bound <= its upper bound.
    """
    errs = _Errors()
    if lp.n == 0:
        errs.add("/variables", "a model needs at least one variable")
    for kind, names in (("variables", lp.col_names), ("constraints", lp.row_names)):
        seen: set[str] = set()
        for name in names:
            check_name(name, pointer(kind, name), errs)
            if name in seen:
                errs.add(pointer(kind, name), "the name is used twice")
            seen.add(name)
    for kind, names, lo, up in (
        ("variables", lp.col_names, lp.col_lower, lp.col_upper),
        ("constraints", lp.row_names, lp.row_lower, lp.row_upper),
    ):
        for k in np.flatnonzero(lo > up):
            errs.add(
                pointer(kind, names[k], "lower"),
                f"lower bound {_fmt(lo[k])} exceeds upper bound {_fmt(up[k])}",
            )
    errs.raise_if_any()


# --------------------------------------------------------------------------------------------
# Merge patch, reference path (whole document)
# --------------------------------------------------------------------------------------------


def merge_patch(target: Any, patch: Any) -> Any:
    """RFC 7396 MergePatch(Target, Patch), exactly as the RFC's pseudocode."""
    if not isinstance(patch, dict):
        return patch
    out = dict(target) if isinstance(target, dict) else {}
    for key, value in patch.items():
        if value is None:
            out.pop(key, None)
        else:
            out[key] = merge_patch(out.get(key), value)
    return out


def merge_document(doc: dict[str, Any], patch: Any) -> Any:
    """Apply a merge patch to a model document, with null bounds meaning "unbounded".

    The slow reference for ``apply_patch``: the result may be invalid and is
    checked by ``from_document``.
    """
    if not isinstance(patch, dict):
        return patch
    out = dict(doc)
    for key, value in patch.items():
        if key in ("variables", "constraints") and isinstance(value, dict):
            current = out.get(key)
            entities = dict(current) if isinstance(current, dict) else {}
            for name, entity_patch in value.items():
                if entity_patch is None:
                    entities.pop(name, None)
                elif isinstance(entity_patch, dict):
                    base = entities.get(name)
                    merged = dict(base) if isinstance(base, dict) else {}
                    for field_name, field_value in entity_patch.items():
                        if field_name in BOUND_KEYS:
                            merged[field_name] = field_value  # null keeps its meaning: unbounded
                        elif field_value is None:
                            merged.pop(field_name, None)
                        else:
                            merged[field_name] = merge_patch(merged.get(field_name), field_value)
                    entities[name] = merged
                else:
                    entities[name] = entity_patch
            out[key] = entities
        elif value is None:
            out.pop(key, None)
        else:
            out[key] = merge_patch(out.get(key), value)
    return out


# --------------------------------------------------------------------------------------------
# Merge patch, fast path (arrays) and change classification
# --------------------------------------------------------------------------------------------


@dataclass
class ChangeSet:
    """What a patch changed, in names, classified for the choice of simplex method.

    Dual simplex suits changes that keep the old basis dual feasible (rows
    added, bounds and right-hand sides moved); primal simplex suits changes
    that keep it primal feasible (columns added, costs changed).
    """

    rows_added: list[str] = field(default_factory=list)
    rows_removed: list[str] = field(default_factory=list)
    columns_added: list[str] = field(default_factory=list)
    columns_removed: list[str] = field(default_factory=list)
    row_bounds: list[str] = field(default_factory=list)
    column_bounds: list[str] = field(default_factory=list)
    costs: list[str] = field(default_factory=list)
    coefficients: list[str] = field(default_factory=list)
    sense: bool = False
    objective_offset: bool = False
    name: bool = False
    # for each column/row of the new model, its position in the old one (-1: new); lets callers
    # carry values across without matching names again
    col_source: np.ndarray | None = field(default=None, repr=False, compare=False)
    row_source: np.ndarray | None = field(default=None, repr=False, compare=False)

    LISTS = (
        "rows_added",
        "rows_removed",
        "columns_added",
        "columns_removed",
        "row_bounds",
        "column_bounds",
        "costs",
        "coefficients",
    )

    def empty(self) -> bool:
        return not (
            any(getattr(self, k) for k in self.LISTS) or self.sense or self.objective_offset or self.name
        )

    def model_changed(self) -> bool:
        """True when the numbers changed (a new name alone needs no re-optimization)."""
        return any(getattr(self, k) for k in self.LISTS) or self.sense or self.objective_offset

    def kind(self) -> str:
        """ "dual", "primal", "both" or "none": which simplex the change calls for."""
        dual = bool(self.rows_added or self.row_bounds or self.column_bounds or self.rows_removed)
        primal = bool(self.columns_added or self.costs or self.sense or self.columns_removed)
        if self.coefficients:
            dual = primal = True
        if dual and primal:
            return "both"
        return "dual" if dual else "primal" if primal else "none"

    def counts(self) -> dict[str, int]:
        return {k: len(getattr(self, k)) for k in self.LISTS}

    def summary(self, cap: int = LIST_CAP) -> dict[str, Any]:
        out: dict[str, Any] = {k: getattr(self, k)[:cap] for k in self.LISTS}
        out["counts"] = self.counts()
        out["sense_changed"] = self.sense
        out["objective_offset_changed"] = self.objective_offset
        out["name_changed"] = self.name
        out["kind"] = self.kind()
        return out


_MISSING = object()


def _row_terms(csr: sp.csr_matrix, i: int, col_names: list[str]) -> dict[str, float]:
    start, stop = csr.indptr[i], csr.indptr[i + 1]
    return {
        col_names[j]: float(v)
        for j, v in zip(csr.indices[start:stop].tolist(), csr.data[start:stop].tolist())
        if v
    }


def apply_patch(lp: LinearProgram, patch: Any) -> tuple[LinearProgram, ChangeSet]:
    """Apply a model merge patch to a LinearProgram; return the new model and what changed.

    Touches only the variables and constraints the patch names. Raises
    DocumentError (with JSON pointers into the patch) when the patch or the
    patched model is not valid; ``lp`` itself is never modified.
    """
    errs = _Errors()
    if not isinstance(patch, dict):
        errs.add("", "a merge patch of a model must be a JSON object")
        errs.raise_if_any("The merge patch is not valid")
    _unknown_keys(patch, DOC_KEYS, (), errs)
    changes = ChangeSet()

    name = lp.name
    if "name" in patch:
        value = "" if patch["name"] is None else _title(patch["name"], "/name", errs)
        name = lp.name if value is None else value
        changes.name = name != lp.name
    sense = lp.sense
    if "sense" in patch:
        sense = MINIMIZE if patch["sense"] is None else (_sense(patch["sense"], "/sense", errs) or lp.sense)
        changes.sense = sense != lp.sense
    offset = lp.offset
    if "objective_offset" in patch:
        value = patch["objective_offset"]
        offset = 0.0 if value is None else _number(value, "/objective_offset", errs)
        offset = lp.offset if offset is None else offset
        changes.objective_offset = offset != lp.offset

    n_old, m_old = lp.n, lp.m
    col_index = name_index(lp, "col_names")
    row_index = name_index(lp, "row_names")

    # ---- variables: removal marks, edits of existing ones, new ones appended in patch order
    col_keep = np.ones(n_old, dtype=bool)
    c = lp.c.copy()
    col_lower = lp.col_lower.copy()
    col_upper = lp.col_upper.copy()
    new_cols: list[tuple[str, float, float, float]] = []
    new_col_pos: dict[str, int] = {}
    vpatch = patch.get("variables", _MISSING)
    if vpatch is None:
        col_keep[:] = False
    elif vpatch is not _MISSING and not isinstance(vpatch, dict):
        errs.add("/variables", "must be an object mapping variable names to merge patches")
    elif isinstance(vpatch, dict):
        for vname, vp in vpatch.items():
            base = ("variables", vname)
            if not check_name(vname, pointer(*base), errs):
                continue
            j = col_index.get(vname)
            if vp is None:
                if j is not None:
                    col_keep[j] = False
                continue
            if not isinstance(vp, dict):
                errs.add(
                    pointer(*base), "a variable patch must be an object (or null to remove the variable)"
                )
                continue
            _unknown_keys(vp, VAR_KEYS, base, errs)
            if j is None:
                cost, lo, up = _variable_fields(vp, base, errs)
                new_col_pos[vname] = len(new_cols)
                new_cols.append((vname, cost, lo, up))
                continue
            cost, lo, up = c[j], col_lower[j], col_upper[j]
            if "cost" in vp:
                value = 0.0 if vp["cost"] is None else _number(vp["cost"], pointer(*base, "cost"), errs)
                cost = cost if value is None else value
            if "lower" in vp:
                value = _bound(vp["lower"], pointer(*base, "lower"), errs, -np.inf)
                lo = lo if value is None else value
            if "upper" in vp:
                value = _bound(vp["upper"], pointer(*base, "upper"), errs, np.inf)
                up = up if value is None else value
            if lo > up:
                errs.add(
                    pointer(*base, _moved_bound(vp)), f"lower bound {_fmt(lo)} exceeds upper bound {_fmt(up)}"
                )
            if cost != c[j]:
                changes.costs.append(vname)
            if lo != col_lower[j] or up != col_upper[j]:
                changes.column_bounds.append(vname)
            c[j], col_lower[j], col_upper[j] = cost, lo, up

    kept_cols = np.flatnonzero(col_keep)
    if kept_cols.size + len(new_cols) == 0:
        errs.add("/variables", "a model needs at least one variable")
    final_col = _FinalColumns(col_index, col_keep, kept_cols, new_col_pos)

    # ---- constraints
    row_keep = np.ones(m_old, dtype=bool)
    row_lower = lp.row_lower.copy()
    row_upper = lp.row_upper.copy()
    rewritten: dict[int, dict[str, float]] = {}  # old row -> its complete new terms
    new_rows: list[tuple[str, dict[str, float], float, float]] = []
    csr: sp.csr_matrix | None = None
    cpatch = patch.get("constraints", _MISSING)
    if cpatch is None:
        row_keep[:] = False
    elif cpatch is not _MISSING and not isinstance(cpatch, dict):
        errs.add("/constraints", "must be an object mapping constraint names to merge patches")
    elif isinstance(cpatch, dict):
        for cname, cp in cpatch.items():
            base = ("constraints", cname)
            if not check_name(cname, pointer(*base), errs):
                continue
            i = row_index.get(cname)
            if cp is None:
                if i is not None:
                    row_keep[i] = False
                continue
            if not isinstance(cp, dict):
                errs.add(pointer(*base), "a constraint patch must be an object (or null to remove it)")
                continue
            _unknown_keys(cp, CON_KEYS, base, errs)
            if i is None:
                lo, up = _constraint_bounds(cp, base, errs)
                terms = _patch_terms({}, cp.get("terms"), base, final_col, errs)
                new_rows.append((cname, terms, lo, up))
                continue
            lo, up = row_lower[i], row_upper[i]
            if "lower" in cp:
                value = _bound(cp["lower"], pointer(*base, "lower"), errs, -np.inf)
                lo = lo if value is None else value
            if "upper" in cp:
                value = _bound(cp["upper"], pointer(*base, "upper"), errs, np.inf)
                up = up if value is None else value
            if lo > up:
                errs.add(
                    pointer(*base, _moved_bound(cp)), f"lower bound {_fmt(lo)} exceeds upper bound {_fmt(up)}"
                )
            if lo != row_lower[i] or up != row_upper[i]:
                changes.row_bounds.append(cname)
            row_lower[i], row_upper[i] = lo, up
            if "terms" in cp:
                if csr is None:
                    csr = lp.A.tocsr()
                old_terms = _row_terms(csr, i, lp.col_names)
                terms = _patch_terms(old_terms, cp["terms"], base, final_col, errs)
                if terms != old_terms:
                    changes.coefficients.append(cname)
                rewritten[i] = terms

    # ---- a removed variable may not stay in a kept constraint
    removed_cols = np.flatnonzero(~col_keep)
    if removed_cols.size:
        A = lp.A
        for j in removed_cols.tolist():
            vname = lp.col_names[j]
            start, stop = A.indptr[j], A.indptr[j + 1]
            for i, value in zip(A.indices[start:stop].tolist(), A.data[start:stop].tolist()):
                if value and row_keep[i] and i not in rewritten:
                    errs.add(
                        pointer("variables", vname),
                        f"cannot remove the variable: constraint {lp.row_names[i]!r} still uses it",
                    )
        for i, terms in rewritten.items():
            if row_keep[i]:
                for vname in terms:
                    if vname not in final_col:
                        errs.add(
                            pointer("constraints", lp.row_names[i], "terms", vname),
                            "names a variable that is not in the model",
                        )
    errs.raise_if_any("The merge patch is not valid")

    changes.columns_removed = [lp.col_names[j] for j in removed_cols.tolist()]
    changes.columns_added = [v[0] for v in new_cols]
    changes.rows_removed = [lp.row_names[i] for i in np.flatnonzero(~row_keep).tolist()]
    changes.rows_added = [r[0] for r in new_rows]
    changes.costs = [v for v in changes.costs if col_keep[col_index[v]]]
    changes.column_bounds = [v for v in changes.column_bounds if col_keep[col_index[v]]]
    changes.row_bounds = [r for r in changes.row_bounds if row_keep[row_index[r]]]
    changes.coefficients = [r for r in changes.coefficients if row_keep[row_index[r]]]

    # ---- assemble the new arrays
    kept_rows = np.flatnonzero(row_keep)
    n_new = kept_cols.size + len(new_cols)
    m_new = kept_rows.size + len(new_rows)
    col_map = np.full(n_old, -1, dtype=np.int64)
    col_map[kept_cols] = np.arange(kept_cols.size)
    row_map = np.full(m_old, -1, dtype=np.int64)
    row_map[kept_rows] = np.arange(kept_rows.size)

    extra_r: list[int] = []
    extra_c: list[int] = []
    extra_v: list[float] = []
    for i, terms in rewritten.items():
        if row_keep[i]:
            for vname, value in terms.items():
                extra_r.append(int(row_map[i]))
                extra_c.append(final_col[vname])
                extra_v.append(value)
    for k, (_cname, terms, _lo, _up) in enumerate(new_rows):
        for vname, value in terms.items():
            extra_r.append(kept_rows.size + k)
            extra_c.append(final_col[vname])
            extra_v.append(value)
    er = np.asarray(extra_r, dtype=np.int64)
    ec = np.asarray(extra_c, dtype=np.int64)
    ev = np.asarray(extra_v, dtype=float)
    if not rewritten and kept_cols.size == n_old and kept_rows.size == m_old:
        A_new = _append_entries(lp.A, er, ec, ev, (m_new, n_new))
    else:
        coo = lp.A.tocoo()
        r_old, c_old, v_old = coo.row.astype(np.int64), coo.col.astype(np.int64), coo.data
        keep = (row_map[r_old] >= 0) & (col_map[c_old] >= 0)
        if rewritten:
            keep &= ~np.isin(r_old, np.fromiter(rewritten.keys(), dtype=np.int64))
        rows = np.concatenate([row_map[r_old[keep]], er])
        cols = np.concatenate([col_map[c_old[keep]], ec])
        vals = np.concatenate([v_old[keep], ev])
        A_new = sp.csc_matrix((vals, (rows, cols)), shape=(m_new, n_new))
    changes.col_source = np.concatenate([kept_cols, np.full(len(new_cols), -1, dtype=np.int64)])
    changes.row_source = np.concatenate([kept_rows, np.full(len(new_rows), -1, dtype=np.int64)])

    def extend(old: np.ndarray, keep_idx: np.ndarray, extra: list[float]) -> np.ndarray:
        return np.concatenate([old[keep_idx], np.asarray(extra, dtype=float)])

    new_lp = LinearProgram(
        A=A_new,
        c=extend(c, kept_cols, [v[1] for v in new_cols]),
        col_lower=extend(col_lower, kept_cols, [v[2] for v in new_cols]),
        col_upper=extend(col_upper, kept_cols, [v[3] for v in new_cols]),
        row_lower=extend(row_lower, kept_rows, [r[2] for r in new_rows]),
        row_upper=extend(row_upper, kept_rows, [r[3] for r in new_rows]),
        sense=sense,
        offset=offset,
        col_names=_kept(lp.col_names, kept_cols) + [v[0] for v in new_cols],
        row_names=_kept(lp.row_names, kept_rows) + [r[0] for r in new_rows],
        name=name,
    )
    # hand the name index on when only appends happened: the next patch of this version needs it
    for attr, index, kept, added in (
        ("col_names", col_index, kept_cols, new_cols),
        ("row_names", row_index, kept_rows, new_rows),
    ):
        if kept.size == len(index):
            carried = dict(index)
            carried.update({item[0]: len(index) + k for k, item in enumerate(added)})
            new_lp.__dict__[f"_index_{attr}"] = (getattr(new_lp, attr), carried)
    return new_lp, changes


def name_index(lp: LinearProgram, attr: str) -> dict[str, int]:
    """Position of each name, built once per model object (models are never changed in place)."""
    names = getattr(lp, attr)
    cached = lp.__dict__.get(f"_index_{attr}")
    if cached is not None and cached[0] is names and len(cached[1]) == len(names):
        return cached[1]
    index = {nm: k for k, nm in enumerate(names)}
    lp.__dict__[f"_index_{attr}"] = (names, index)
    return index


class _FinalColumns:
    """Name -> position in the patched model, without building a dict of every name."""

    def __init__(
        self, index: dict[str, int], keep: np.ndarray, kept: np.ndarray, new: dict[str, int]
    ) -> None:
        self.index, self.keep, self.new = index, keep, new
        self.n_kept = kept.size
        self.shift = None
        if kept.size != keep.size:
            self.shift = np.cumsum(keep) - 1  # old position -> new position, for kept columns

    def __contains__(self, name: str) -> bool:
        j = self.index.get(name)
        return (j is not None and bool(self.keep[j])) or name in self.new

    def __getitem__(self, name: str) -> int:
        j = self.index.get(name)
        if j is not None and self.keep[j]:
            return j if self.shift is None else int(self.shift[j])
        return self.n_kept + self.new[name]


def _kept(names: list[str], kept: np.ndarray) -> list[str]:
    return list(names) if kept.size == len(names) else [names[k] for k in kept.tolist()]


def _append_entries(
    A: sp.csc_matrix, rows: np.ndarray, cols: np.ndarray, vals: np.ndarray, shape: tuple[int, int]
) -> sp.csc_matrix:
    """A with new rows and columns appended, given the new entries (all in new rows or new columns).

    Works on the CSC arrays directly: new row indices are larger than every
    old one, so each entry goes at the end of its column, and the matrix never
    passes through COO. This keeps a one-row change to a big model cheap.
    """
    A = A.tocsc()
    m_old, n_old = A.shape
    order = np.lexsort((rows, cols))
    rows, cols, vals = rows[order], cols[order], vals[order]
    old = cols < n_old
    pos = A.indptr[cols[old] + 1]
    data = np.insert(A.data, pos, vals[old])
    indices = np.insert(A.indices.astype(np.int64), pos, rows[old])
    data = np.concatenate([data, vals[~old]])
    indices = np.concatenate([indices, rows[~old]])
    counts = np.diff(A.indptr).astype(np.int64)
    counts = np.concatenate([counts, np.zeros(shape[1] - n_old, dtype=np.int64)])
    counts += np.bincount(cols, minlength=shape[1])
    indptr = np.concatenate([[0], np.cumsum(counts)])
    return sp.csc_matrix((data, indices, indptr), shape=shape)


def _patch_terms(
    old: dict[str, float], tpatch: Any, base: tuple[str, ...], final_col: dict[str, int], errs: _Errors
) -> dict[str, float]:
    """Merge a terms patch into a row's terms; zero coefficients drop out."""
    if tpatch is None:
        return {}
    if not isinstance(tpatch, dict):
        errs.add(pointer(*base, "terms"), "must be an object mapping variable names to coefficients")
        return dict(old)
    terms = dict(old)
    for vname, coef in tpatch.items():
        ptr = pointer(*base, "terms", vname)
        if coef is None:
            terms.pop(vname, None)
            continue
        value = _number(coef, ptr, errs)
        if value is None:
            continue
        if vname not in final_col:
            errs.add(ptr, "names a variable that is not in the model")
            continue
        if value:
            terms[vname] = value
        else:
            terms.pop(vname, None)
    return terms


def wrap_section_patch(section: str, patch: Any) -> Any:
    """A merge patch of the "variables" or "constraints" map alone, as a model patch.

    A non-object patch would replace the whole map; null would empty it.
    """
    return {section: patch}
