"""Solve results to the JSON the clients read: names, not indices; orjson for speed.

The stored part of a result (``result_record``) is small JSON: status,
objective, the solve section, the pivot log and the change report. The plan
itself (values, duals, basis statuses) is kept as arrays and turned into
JSON only when a response asks for it (``render_result``), trimmed by the
``solution`` view and the ``fields`` list.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import orjson

from service.lp.basis import STATUS_NAMES, Basis, Status
from service.lp.model import LinearProgram
from service.lp.result import SolveResult
from service.plan_json import plan_object
from service.store import Solution, VersionRecord

SECTIONS = ("solution", "solve", "pivot_log", "changes")
SOLUTION_VIEWS = ("full", "nonzero", "moved", "none")
ZERO = 1e-12  # values closer to zero than this are written as 0 (no -0.0 or 1e-17 noise in plans)
MOVE_TOL = 1e-9  # relative change that counts as "moved"
STORED_MOVES = 1000  # moved variables kept in a stored change report
_STATUS_WORDS = [STATUS_NAMES[s] for s in Status]  # by status code


def dumps(obj: Any) -> bytes:
    return orjson.dumps(obj)


def jsonable(value: Any) -> Any:
    """Plain JSON values: numpy scalars to Python, non-finite floats to null."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if value is None or isinstance(value, str):
        return value
    return str(value)


def _name_check(check: dict[str, Any], lp: LinearProgram) -> dict[str, Any]:
    """The engine's check figures, with any row/column index turned into its name."""
    out = jsonable(check)
    for key, names in (
        ("worst_row", lp.row_names),
        ("worst_dual_row", lp.row_names),
        ("worst_column", lp.col_names),
        ("worst_dual_column", lp.col_names),
    ):
        value = out.get(key)
        if isinstance(value, int) and 0 <= value < len(names):
            out[key] = names[value]
    return out


_PLAIN = (str, int, type(None))


def _plain(entry: dict[str, Any]) -> bool:
    """True when every value is already a JSON value (the engine's own pivot records)."""
    for v in entry.values():
        t = type(v)
        if t is float:
            if not math.isfinite(v):
                return False
        elif t not in _PLAIN:
            return False
    return True


def _name_log_entry(entry: dict[str, Any], lp: LinearProgram) -> dict[str, Any]:
    out = dict(entry) if _plain(entry) else jsonable(entry)
    for key in ("leaving", "entering"):
        value = out.get(key)
        kind = out.get(f"{key}_kind")
        if isinstance(value, int):  # an index: name it (columns first, then row logicals)
            if kind == "constraint" and value < lp.m:
                out[key] = lp.row_names[value]
            elif value < lp.n:
                out[key] = lp.col_names[value]
            elif value < lp.n + lp.m:
                out[key] = lp.row_names[value - lp.n]
    return out


def solution_of(res: SolveResult) -> Solution:
    return Solution(res.x, res.row_activity, res.shadow_price, res.reduced_cost)


def split_log(entries: list[dict[str, Any]]) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Pivots apart from engine events (refactorization, reuse, perturbation, rule switch).

    The engine hands both over in one list; the contract's pivot_log is one
    entry per pivot with the same fields each, so events are reported in
    ``solve.events`` instead.
    """
    pivots = [e for e in entries if "event" not in e]
    events = [e for e in entries if "event" in e]
    return pivots, events


def result_record(res: SolveResult, lp: LinearProgram, changes: dict[str, Any] | None) -> dict[str, Any]:
    """The JSON part of a result that is stored with its version."""
    pivots, events = split_log([_name_log_entry(e, lp) for e in res.pivot_log])
    timings = {k: round(v * 1000.0, 3) for k, v in res.timings.items() if isinstance(v, (int, float))}
    objective = None if res.objective is None or not math.isfinite(res.objective) else float(res.objective)
    return {
        "status": res.status,
        "objective": objective,
        "message": res.message or None,
        "solve": {
            "method": res.method,
            "warm": bool(res.warm),
            "pivots": int(res.pivots),
            "reason": res.reason,
            "fallback": jsonable(res.fallback) if res.fallback else None,
            "check": _name_check(res.check or {}, lp),
            "time_ms": timings.get("total", round(sum(timings.values()), 3)),
            "timings_ms": timings,
            "log_dropped": int(res.log_dropped),
            "events": events,
        },
        "pivot_log": pivots,
        "changes": changes,
        **_certificate(res, lp),
    }


def _certificate(res: SolveResult, lp: LinearProgram) -> dict[str, Any]:
    """The proof behind an infeasible (or unbounded) answer, by name, nonzeros only.

    ``farkas``: row multipliers y with y'A x bounded away from every point the
    row bounds allow (``service.lp.check.verify_farkas`` accepted it);
    ``ray``: a direction along which the objective improves without end.
    """
    out: dict[str, Any] = {}
    for key, values, names in (("farkas", res.farkas, lp.row_names), ("ray", res.ray, lp.col_names)):
        if values is None:
            continue
        v = np.asarray(values, dtype=float)
        scale = float(np.abs(v).max(initial=0.0))
        nz = np.flatnonzero(np.abs(v) > ZERO * max(1.0, scale))
        out[key] = {names[k]: float(v[k]) for k in nz.tolist() if math.isfinite(v[k])}
    return {"certificate": out} if out else {}


def summary_record(version: int, created_at: float, result: dict[str, Any], change_kind: dict | None) -> dict:
    """One line of the version listing."""
    solve = result["solve"]
    return {
        "version": version,
        "created_at": created_at,
        "changes": change_kind,
        "status": result["status"],
        "objective": result["objective"],
        "method": solve["method"],
        "warm": solve["warm"],
        "pivots": solve["pivots"],
    }


def _snap(values: np.ndarray) -> np.ndarray:
    """Values closer to zero than ZERO as 0.0 (+ 0.0 turns -0.0 into 0.0)."""
    return np.where(np.abs(values) < ZERO, 0.0, values) + 0.0


def _clean(values: np.ndarray) -> list[float]:
    v = _snap(values)
    v = np.where(np.isfinite(v), v, np.nan)
    return [None if math.isnan(x) else x for x in v.tolist()] if np.isnan(v).any() else v.tolist()


def moved_indices(new: np.ndarray | None, old: np.ndarray | None) -> np.ndarray:
    """Positions where ``new`` differs from ``old`` (NaN in old: new entries, moved if nonzero)."""
    if new is None:
        return np.zeros(0, dtype=np.int32)
    if old is None:
        old = np.zeros_like(new)
    base = np.where(np.isnan(old), 0.0, old)
    moved = np.abs(new - base) > MOVE_TOL * (1.0 + np.abs(base))
    moved |= np.isnan(old) & (np.abs(new) > ZERO)
    return np.flatnonzero(moved).astype(np.int32)


def moved_either(first: np.ndarray, second: np.ndarray, size: int) -> np.ndarray:
    """The sorted union of two position lists in range(size) (a mask, not np.union1d's sort)."""
    mask = np.zeros(size, dtype=bool)
    mask[first] = True
    mask[second] = True
    return np.flatnonzero(mask).astype(np.int32)


def plan_positions(
    lp: LinearProgram, sol: Solution, basis: Basis | None, view: str, record: VersionRecord | None = None
) -> tuple[np.ndarray, np.ndarray] | None:
    """The columns and rows a solution view shows (None: no plan to show)."""
    if view == "none" or sol.x is None:
        return None
    n, m = lp.n, lp.m
    if view == "full":
        cols, rows = np.arange(n), np.arange(m)
    elif view == "moved":
        cols = record.moved_cols if record is not None and record.moved_cols is not None else np.arange(n)
        rows = record.moved_rows if record is not None and record.moved_rows is not None else np.arange(m)
    else:  # nonzero: the lanes in use, and the rows that bind or carry a price
        cols = np.flatnonzero(np.abs(sol.x) > ZERO)
        keep = np.zeros(m, dtype=bool)
        if sol.shadow_price is not None:
            keep |= np.abs(sol.shadow_price) > ZERO
        if basis is not None:
            keep |= basis.row_status != Status.BASIC
        rows = np.flatnonzero(keep)
    return cols, rows


def solution_json(
    lp: LinearProgram, sol: Solution, basis: Basis | None, view: str, record: VersionRecord | None = None
) -> dict[str, Any] | None:
    """The plan by name: value, reduced cost, basis status per variable; activity, shadow price per row.

    The two maps come as ``orjson.Fragment`` (encoded JSON objects, see plan_json.py): encode the
    result with orjson; clients read ordinary JSON objects."""
    picked = plan_positions(lp, sol, basis, view, record)
    if picked is None:
        return None
    cols, rows = picked

    def pick(arr: np.ndarray | None, idx: np.ndarray) -> np.ndarray | None:
        if arr is None:
            return None
        return _snap(arr[idx])  # as _clean; non-finite values are written as null (plan_json)

    if basis is not None:
        col_codes, row_codes, words = basis.col_status[cols], basis.row_status[rows], _STATUS_WORDS
    else:
        col_codes, row_codes, words = np.zeros(cols.size, np.int64), np.zeros(rows.size, np.int64), [None]
    # the whole plan names every entry in order: the name lists themselves (no index lookups)
    col_names = lp.col_names if view == "full" else [lp.col_names[j] for j in cols.tolist()]
    row_names = lp.row_names if view == "full" else [lp.row_names[i] for i in rows.tolist()]
    variables = plan_object(
        col_names, ("value", "reduced_cost", "basis"), pick(sol.x, cols), pick(sol.reduced_cost, cols), col_codes, words
    )
    constraints = plan_object(
        row_names, ("activity", "shadow_price", "basis"),
        pick(sol.row_activity, rows), pick(sol.shadow_price, rows), row_codes, words,
    )  # fmt: skip
    return {"variables": variables, "constraints": constraints}


def render_result(
    model_id: str,
    record: VersionRecord,
    sections: tuple[str, ...] = SECTIONS,
    solution_view: str = "full",
    changes_limit: int = 100,
) -> dict[str, Any]:
    """The result object of the HTTP contract for one stored version."""
    res = record.result
    out: dict[str, Any] = {
        "id": model_id,
        "version": record.version,
        "status": res["status"],
        "objective": res["objective"],
    }
    if res.get("message"):
        out["message"] = res["message"]
    if res.get("certificate"):
        out["certificate"] = res["certificate"]
    if res.get("restored_from") is not None:
        out["restored_from"] = res["restored_from"]
    if "solution" in sections:
        out["solution"] = solution_json(record.lp, record.solution, record.basis, solution_view, record)
    pivot_log = res["pivot_log"]
    solve = res["solve"]
    if "events" not in solve:  # stored before events had their own list
        pivot_log, events = split_log(pivot_log)
        solve = {**solve, "events": events}
    if "solve" in sections:
        out["solve"] = solve
    if "pivot_log" in sections:
        out["pivot_log"] = pivot_log
    if "changes" in sections:
        changes = res.get("changes")
        if changes is not None:
            changes = dict(changes)
            for key in ("variables", "shadow_prices"):  # the change report's `limit`, per list
                moved = changes.get(key) or {}
                if len(moved) > changes_limit:
                    changes[key] = dict(list(moved.items())[:changes_limit])
                    changes["truncated"] = True
            rows = changes.get("constraints")
            if rows and any(len(v) > changes_limit for v in rows.values()):
                changes["constraints"] = {k: v[:changes_limit] for k, v in rows.items()}
                changes["truncated"] = True
        out["changes"] = changes
    return out


def change_report(
    before: VersionRecord,
    after_lp: LinearProgram,
    after: Solution,
    after_objective: float | None,
    model_changes: dict[str, Any],
    col_src: np.ndarray | None = None,
    row_src: np.ndarray | None = None,
) -> tuple[dict[str, Any], np.ndarray, np.ndarray]:
    """What moved between two versions, by name: objective, variable values, counts.

    ``col_src``/``row_src`` give each new column/row's old position (-1: new);
    without them positions are matched by name. Returns the JSON report and
    the moved column and row positions (in the new model).
    """
    old_lp, old = before.lp, before.solution
    if col_src is None:
        col_pos = {name: j for j, name in enumerate(old_lp.col_names)}
        col_src = np.fromiter(
            (col_pos.get(nm, -1) for nm in after_lp.col_names), dtype=np.int64, count=after_lp.n
        )
    if row_src is None:
        row_pos = {name: i for i, name in enumerate(old_lp.row_names)}
        row_src = np.fromiter(
            (row_pos.get(nm, -1) for nm in after_lp.row_names), dtype=np.int64, count=after_lp.m
        )

    def carried(old_values: np.ndarray | None, src: np.ndarray) -> np.ndarray | None:
        if old_values is None:
            return None
        out = np.full(src.size, np.nan)
        out[src >= 0] = old_values[src[src >= 0]]
        return out

    old_x = carried(old.x, col_src)
    moved_cols = moved_indices(after.x, old_x)
    moved_rows = moved_either(
        moved_indices(after.row_activity, carried(old.row_activity, row_src)),
        moved_indices(after.shadow_price, carried(old.shadow_price, row_src)),
        after_lp.m,
    )

    variables: dict[str, dict[str, float | None]] = {}
    if after.x is not None:
        before_vals = np.zeros(after_lp.n) if old_x is None else np.where(np.isnan(old_x), 0.0, old_x)
        delta = after.x[moved_cols] - before_vals[moved_cols]
        impact = np.abs(after_lp.c[moved_cols] * delta)
        order = np.lexsort((-np.abs(delta), -impact))[:STORED_MOVES]  # biggest cost impact first
        picked = moved_cols[order]
        afters = _clean(after.x[picked])
        priors = [None] * picked.size if old_x is None else old_x[picked].tolist()
        names = after_lp.col_names
        for j, prior, value in zip(picked.tolist(), priors, afters):
            variables[names[j]] = {
                "before": None if prior is None or math.isnan(prior) else prior,
                "after": value,
            }
        if old.x is not None:  # removed variables that carried flow
            removed = np.ones(old_lp.n, dtype=bool)
            removed[col_src[col_src >= 0]] = False
            for j in np.flatnonzero(removed & (np.abs(old.x) > ZERO)).tolist():
                if len(variables) < STORED_MOVES:
                    variables[old_lp.col_names[j]] = {"before": float(old.x[j]), "after": None}
    binding = _binding_report(before, after_lp, after, row_src)
    binding_truncated = binding.pop("_truncated")
    prior_obj = before.result.get("objective")
    report = {
        "model": model_changes,
        "objective": {
            "before": prior_obj,
            "after": after_objective,
            "delta": None if prior_obj is None or after_objective is None else after_objective - prior_obj,
        },
        "moved": {"variables": int(moved_cols.size), "constraints": int(moved_rows.size)},
        "variables": variables,
        **binding,
        "truncated": bool(moved_cols.size > STORED_MOVES or binding_truncated),
    }
    return report, moved_cols, moved_rows


def _binding(lp_lower: np.ndarray, lp_upper: np.ndarray, activity: np.ndarray) -> np.ndarray:
    """Rows whose activity sits on a finite bound (common practice: 1e-9 relative)."""
    on = np.zeros(activity.size, dtype=bool)
    for bound in (lp_lower, lp_upper):
        fin = np.isfinite(bound)
        on[fin] |= np.abs(activity[fin] - bound[fin]) <= 1e-9 * (1.0 + np.abs(bound[fin]))
    return on


def _binding_report(
    before: VersionRecord, after_lp: LinearProgram, after: Solution, row_src: np.ndarray
) -> dict[str, Any]:
    """Constraints that became or stopped being binding, and shadow prices that changed.

    Compared by row through ``row_src`` (old position of each new row, -1 for
    new rows); only when both versions have a plan. Lists are capped at
    STORED_MOVES each; shadow prices are ordered by the size of their change.
    """
    old_lp, old = before.lp, before.solution
    out: dict[str, Any] = {
        "constraints": {"became_binding": [], "stopped_binding": []},
        "shadow_prices": {},
        "_truncated": False,
    }
    if after.row_activity is None or old.row_activity is None:
        return out
    now = _binding(after_lp.row_lower, after_lp.row_upper, after.row_activity)
    was_old = _binding(old_lp.row_lower, old_lp.row_upper, old.row_activity)
    carried = row_src >= 0
    was = np.zeros(after_lp.m, dtype=bool)
    was[carried] = was_old[row_src[carried]]
    names = after_lp.row_names
    became = np.flatnonzero(now & ~was)
    stopped = np.flatnonzero(~now & was)
    out["constraints"] = {
        "became_binding": [names[i] for i in became[:STORED_MOVES].tolist()],
        "stopped_binding": [names[i] for i in stopped[:STORED_MOVES].tolist()],
    }
    truncated = became.size > STORED_MOVES or stopped.size > STORED_MOVES
    if after.shadow_price is not None and old.shadow_price is not None:
        prior = np.full(after_lp.m, np.nan)
        prior[carried] = old.shadow_price[row_src[carried]]
        changed = moved_indices(after.shadow_price, prior)
        base = np.where(np.isnan(prior), 0.0, prior)
        order = np.argsort(-np.abs(after.shadow_price[changed] - base[changed]), kind="stable")
        truncated |= changed.size > STORED_MOVES
        pick = changed[order[:STORED_MOVES]]
        # one vectorized clean for each side (a new row's missing "before" becomes None)
        out["shadow_prices"] = {
            names[i]: {"before": b, "after": a}
            for i, b, a in zip(pick.tolist(), _clean(prior[pick]), _clean(after.shadow_price[pick]))
        }
    out["_truncated"] = bool(truncated)
    return out
