"""Why is it infeasible? An irreducible infeasible subset (IIS) of bounds.

Members are single bound sides: the lower or the upper bound of a constraint
(row) or of a variable (column). An IIS is a set of them that admits no
solution while every proper subset does (Chinneck and Dravnieks, 1991).

Method:
1. Start from the support of a Farkas certificate: the rows with a nonzero
   multiplier and the column bounds the certificate leans on. That subsystem
   is infeasible by the certificate itself, and usually small, so it plays the
   role of the elastic filter (it discards what cannot be in the conflict).
2. Deletion filter: relax one member at a time (set that bound side to
   infinity) and re-solve a feasibility problem (zero costs) warm from the
   previous basis. Still infeasible: the member is not needed, drop it for
   good. Feasible: the member is needed, restore it. What is left is
   irreducible.
Only bounds change between the solves, so each one reuses the previous
factorization (see simplex.EngineState) and takes a handful of pivots.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from .basis import slack_basis
from .check import verify_farkas
from .engine import reoptimize, solve
from .model import LinearProgram
from .result import INFEASIBLE, OPTIMAL, SolveOptions


@dataclass
class ConflictMember:
    kind: str  # "constraint" or "variable"
    name: str
    index: int
    side: str  # "lower" or "upper": the bound this member contributes
    bound: float


@dataclass
class Conflict:
    members: list[ConflictMember]
    solves: int = 0
    pivots: int = 0
    seconds: float = 0.0
    started_from: int = 0  # members in the certificate's support
    notes: list[str] = field(default_factory=list)


class NotInfeasible(ValueError):
    """The model has a feasible point: there is no conflict to explain."""


def _members_from_certificate(lp: LinearProgram, y: np.ndarray, tol: float) -> list[tuple[str, int, str]]:
    check = verify_farkas(lp, y, tol=tol)
    sign = 1.0 if check.get("side") == "max<0" else -1.0
    y = y / max(np.abs(y).max(initial=0.0), 1e-300)
    z = lp.A.T @ y
    col_scale = np.maximum(1.0, np.asarray(abs(lp.A).max(axis=0).todense()).ravel())
    out: list[tuple[str, int, str]] = []
    # maximising sign * (z @ x - y @ r) over the box leans on: columns' upper
    # bound where sign * z > 0, lower where < 0; rows' upper where -sign * y > 0
    for j in np.flatnonzero(np.abs(z) > 1e-12 * col_scale):
        out.append(("variable", int(j), "upper" if sign * z[j] > 0 else "lower"))
    for i in np.flatnonzero(np.abs(y) > 1e-12):
        out.append(("constraint", int(i), "upper" if -sign * y[i] > 0 else "lower"))
    return out


def _all_members(lp: LinearProgram) -> list[tuple[str, int, str]]:
    out: list[tuple[str, int, str]] = []
    for kind, lower, upper in (
        ("variable", lp.col_lower, lp.col_upper),
        ("constraint", lp.row_lower, lp.row_upper),
    ):
        for k in np.flatnonzero(np.isfinite(lower)):
            out.append((kind, int(k), "lower"))
        for k in np.flatnonzero(np.isfinite(upper)):
            out.append((kind, int(k), "upper"))
    return out


def _bound_arrays(lp: LinearProgram, kind: str, side: str) -> np.ndarray:
    if kind == "variable":
        return lp.col_lower if side == "lower" else lp.col_upper
    return lp.row_lower if side == "lower" else lp.row_upper


def _restricted(lp: LinearProgram, members: list[tuple[str, int, str]]) -> LinearProgram:
    """The feasibility problem holding only the given bound sides."""
    work = lp.copy()
    work.c = np.zeros(lp.n)
    work.offset = 0.0
    work.sense = 1
    keep = set(members)
    for kind, k_arr_lo, k_arr_up in (
        ("variable", work.col_lower, work.col_upper),
        ("constraint", work.row_lower, work.row_upper),
    ):
        for k in range(k_arr_lo.size):
            if (kind, k, "lower") not in keep:
                k_arr_lo[k] = -np.inf
            if (kind, k, "upper") not in keep:
                k_arr_up[k] = np.inf
    return work


def find_conflict(
    lp: LinearProgram,
    farkas: np.ndarray | None = None,
    options: SolveOptions | None = None,
    time_limit: float = 60.0,
) -> Conflict:
    """An irreducible infeasible subset of ``lp``'s bounds, by name and side."""
    started = time.perf_counter()
    options = options or SolveOptions()
    tol = options.check_tol
    conflict = Conflict(members=[])
    if farkas is None or not verify_farkas(lp, farkas, tol=tol)["passed"]:
        first = solve(lp, options)
        conflict.solves += 1
        if first.status != INFEASIBLE:
            raise NotInfeasible(f"the model is not infeasible (status {first.status})")
        farkas = first.farkas
    if farkas is not None and verify_farkas(lp, farkas, tol=tol)["passed"]:
        members = _members_from_certificate(lp, np.asarray(farkas, dtype=float), tol)
    else:
        members = _all_members(lp)
        conflict.notes.append("no usable certificate: the filter started from every bound")
    conflict.started_from = len(members)

    work = _restricted(lp, members)
    res = reoptimize(work, slack_basis(work), options)
    conflict.solves += 1
    conflict.pivots += res.pivots
    if res.status != INFEASIBLE:  # the support alone should be infeasible; fall back to everything
        members = _all_members(lp)
        conflict.notes.append("the certificate's support was not infeasible on its own; used every bound")
        work = _restricted(lp, members)
        res = reoptimize(work, slack_basis(work), options)
        conflict.solves += 1
        if res.status != INFEASIBLE:
            raise NotInfeasible(f"the model is not infeasible (status {res.status})")
    basis, state = res.basis, res.state

    # Deletion filter. Rows first: constraints are what planners change most.
    order = sorted(members, key=lambda m: (m[0] != "constraint", m[1], m[2]))
    kept: list[tuple[str, int, str]] = []
    for member in order:
        if time.perf_counter() - started > time_limit:
            kept.extend(order[order.index(member) :])
            conflict.notes.append("time limit reached: the set may not be irreducible")
            break
        kind, k, side = member
        arr = _bound_arrays(work, kind, side)
        saved = arr[k]
        arr[k] = -np.inf if side == "lower" else np.inf
        trial = reoptimize(work, basis, options, state=state)
        conflict.solves += 1
        conflict.pivots += trial.pivots
        if trial.status == INFEASIBLE:
            pass  # not needed: leave it relaxed
        elif trial.status == OPTIMAL:
            arr[k] = saved  # needed
            kept.append(member)
        else:
            arr[k] = saved
            kept.append(member)
            conflict.notes.append(f"solve ended {trial.status} while testing a member; kept it")
        if trial.basis is not None:
            basis, state = trial.basis, trial.state

    for kind, k, side in kept:
        names = lp.col_names if kind == "variable" else lp.row_names
        bound = float(_bound_arrays(lp, kind, side)[k])
        conflict.members.append(ConflictMember(kind, names[k], k, side, bound))
    conflict.seconds = time.perf_counter() - started
    return conflict
