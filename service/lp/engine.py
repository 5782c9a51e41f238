"""Engine facade: cold solves, warm re-optimization, checks and fallback.

Every result leaving this module has been verified from the original
unscaled data (check.py). A warm solve that hits numerical trouble, a limit,
or a failed check is replaced by a cold HiGHS solve, and the result says so
in ``fallback``; a result that fails its check is never reported optimal.
"""

from __future__ import annotations

import time
from dataclasses import replace

import numpy as np
import scipy.linalg as la

from .basis import Basis, Status, normalize_nonbasic, slack_basis
from .check import verify, verify_farkas, verify_ray
from .factor import SingularBasis
from .highs_cold import solve_highs
from .model import LinearProgram
from .result import ERROR, INFEASIBLE, OPTIMAL, UNBOUNDED, SolveOptions, SolveResult
from .simplex import NumericalTrouble, Simplex

DENSE_REPAIR_LIMIT = 3000  # rows; beyond this a broken basis is solved cold


def solve(lp: LinearProgram, options: SolveOptions | None = None) -> SolveResult:
    """Cold solve with HiGHS (default) or the builtin simplex from the slack basis."""
    options = options or SolveOptions()
    if options.engine == "builtin":
        return _builtin(lp, slack_basis(lp), options, warm=False, reason="cold start from the slack basis")
    if options.engine != "highs":
        raise ValueError(f"unknown engine {options.engine!r}")
    return _highs(lp, options, fallback=None)


def reoptimize(
    lp: LinearProgram,
    basis: Basis,
    options: SolveOptions | None = None,
    *,
    change_summary: str = "",
    state=None,
) -> SolveResult:
    """Warm re-optimization from ``basis`` (already carried over to ``lp``'s shape).

    ``state`` is the ``SolveResult.state`` of the previous solve of the same
    model; when the change only added rows or moved costs and bounds, its
    scaling and factorization are reused instead of refactorizing.
    """
    options = options or SolveOptions()
    if basis.n != lp.n or basis.m != lp.m:
        raise ValueError("basis shape does not match the model; carry it over with remap() first")
    basis = normalize_nonbasic(basis, lp)
    reason = change_summary or "warm start from the stored basis"
    # (the simplex adopts ``state`` only if Simplex.reuse_applies says it fits)
    # The basis is repaired only if it turns out broken (wrong count, or the
    # initial factorization fails), so a sound basis is factorized just once.
    return _builtin(lp, basis, options, warm=True, reason=reason, state=state, repair=True)


def warm_state(lp: LinearProgram, basis: Basis | None, options: SolveOptions | None = None):
    """Scaling and factorization of ``basis`` for the next ``reoptimize(..., state=)``.

    A cold HiGHS solve hands back a basis but no factorization; building one
    here (once, right after the cold solve) lets the first change to the model
    skip scaling and refactorizing. Returns None when the basis cannot be used.
    """
    options = options or SolveOptions()
    if basis is None or basis.n != lp.n or basis.m != lp.m:
        return None
    try:
        sim = Simplex(lp, normalize_nonbasic(basis, lp), options)
        sim.refactor("initial")
    except (SingularBasis, NumericalTrouble, ValueError):
        return None
    return sim.snapshot()


# --------------------------------------------------------------------------- internals
def _highs(lp: LinearProgram, options: SolveOptions, fallback: dict | None) -> SolveResult:
    t = time.perf_counter()
    res = solve_highs(lp, options)
    res.fallback = fallback
    if fallback:
        res.reason = f"cold HiGHS solve after warm start trouble: {fallback['reason']}"
    _attach_check(lp, res, options)
    if res.status == OPTIMAL and not res.check.get("passed", False):
        res.status = ERROR
        res.message = "the HiGHS solution failed the independent check"
    res.timings["total"] = time.perf_counter() - t
    return res


def _builtin(
    lp: LinearProgram,
    basis: Basis,
    options: SolveOptions,
    *,
    warm: bool,
    reason: str,
    state=None,
    repair: bool = False,
) -> SolveResult:
    t = time.perf_counter()
    if lp.trivially_inconsistent_bounds():
        bad = lp.trivially_inconsistent_bounds()
        return _finish_error(
            lp, options, warm, f"lower bound above upper bound for {', '.join(bad[:5])}", t, INFEASIBLE
        )
    sim = None
    try:
        sim = Simplex(lp, basis, options, state)
        out = sim.run()
    except SingularBasis as exc:
        if repair and (sim is None or sim.factor is None):  # broken before the first pivot
            try:
                fixed, report = repair_basis(lp, basis)
            except SingularBasis as exc2:
                return _fallback_or_error(lp, options, warm, "basis_repair_failed", str(exc2), t)
            res = _builtin(lp, fixed, options, warm=warm, reason=reason)
            if report:
                res.check["basis_repair"] = report
            return res
        return _fallback_or_error(lp, options, warm, "singular_basis", str(exc), t)
    except NumericalTrouble as exc:
        return _fallback_or_error(lp, options, warm, exc.reason, str(exc), t)
    except (ValueError, ArithmeticError, IndexError, FloatingPointError) as exc:
        # a defect of ours must not surface as a crash: answer from HiGHS and say why
        return _fallback_or_error(lp, options, warm, "internal_error", f"{type(exc).__name__}: {exc}", t)
    if out.status not in (OPTIMAL, INFEASIBLE, UNBOUNDED):
        return _fallback_or_error(lp, options, warm, out.status, f"stopped after {out.pivots} pivots", t)

    # Only an optimum is a plan: an infeasible or unbounded answer carries its
    # certificate (and the basis, for the next warm start), never the last
    # basic solution, which a planner could mistake for a plan.
    optimal = out.status == OPTIMAL
    shadow = lp.sense * out.y if optimal else None
    x = out.x if optimal else None
    res = SolveResult(
        status=out.status,
        objective=lp.objective_value(x) if optimal else None,
        x=x,
        row_activity=lp.A @ x if optimal else None,
        shadow_price=shadow,
        reduced_cost=lp.c - lp.A.T @ shadow if optimal else None,
        basis=out.basis,
        method=_method_name(out.algorithms, warm),
        warm=warm,
        pivots=out.pivots,
        reason=reason + _algo_phrase(out.algorithms),
        pivot_log=_merge_log(out),
        log_dropped=out.log_dropped,
        timings=dict(out.timings),
        farkas=out.farkas,
        ray=out.ray,
        state=out.state,
    )
    res.timings["simplex"] = time.perf_counter() - t
    _attach_check(lp, res, options)
    if not res.check.get("passed", False):
        return _fallback_or_error(lp, options, warm, "check_failed", _check_summary(res.check), t)
    if options.ranging and res.status == OPTIMAL:
        from .ranging import compute_ranging

        res.ranging = compute_ranging(lp, res.basis, x, shadow, res.reduced_cost)
    res.timings["total"] = time.perf_counter() - t
    return res


def _fallback_or_error(
    lp: LinearProgram, options: SolveOptions, warm: bool, reason: str, detail: str, t0: float
) -> SolveResult:
    if options.fallback:
        # The cold solve gets its own iteration budget (the warm one is what ran
        # out) and the time left of the caller's limit, but at least a tenth of
        # it, so a request takes at most 1.1 times its time limit.
        elapsed = time.perf_counter() - t0
        cold = replace(
            options,
            max_iterations=SolveOptions().max_iterations,
            time_limit=max(options.time_limit - elapsed, 0.1 * options.time_limit),
        )
        res = _highs(lp, cold, fallback={"reason": reason, "detail": detail})
        res.timings["total"] = time.perf_counter() - t0
        return res
    status = reason if reason in ("iteration_limit", "time_limit") else ERROR
    return _finish_error(lp, options, warm, f"{reason}: {detail}", t0, status)


def _finish_error(lp, options, warm, message, t0, status) -> SolveResult:
    res = SolveResult.without_solution(status, method="none", warm=warm, reason=message, message=message)
    res.timings["total"] = time.perf_counter() - t0
    return res


def _attach_check(lp: LinearProgram, res: SolveResult, options: SolveOptions) -> None:
    t = time.perf_counter()
    tol = options.check_tol
    if res.status == OPTIMAL:
        res.check = verify(
            lp, res.x, res.row_activity, res.shadow_price, res.reduced_cost, res.basis, tol=tol
        )
    elif res.status == INFEASIBLE:
        if res.farkas is not None:
            res.check = verify_farkas(lp, res.farkas, tol=tol)
        else:
            res.check = {"passed": False, "detail": "no infeasibility certificate"}
    elif res.status == UNBOUNDED:
        if res.ray is not None:
            res.check = verify_ray(lp, res.ray, tol=tol)
        else:
            res.check = {"passed": False, "detail": "no unbounded ray"}
    else:
        res.check = {"passed": False, "detail": f"no solution to check (status {res.status})"}
    res.timings["check"] = time.perf_counter() - t


def _check_summary(check: dict) -> str:
    keys = [k for k, v in check.items() if isinstance(v, (int, float)) and not isinstance(v, bool)]
    return ", ".join(f"{k}={check[k]:.3g}" for k in keys[:8])


def _method_name(algorithms: list[str], warm: bool) -> str:
    if not warm:
        return "cold_builtin"
    used = []
    for a in algorithms:
        if a not in used:
            used.append(a)
    return "+".join(used) if used else "none"


def _algo_phrase(algorithms: list[str]) -> str:
    if not algorithms:
        return "; the basis was already optimal"
    return "; ran " + " then ".join(algorithms) + " simplex"


def _merge_log(out) -> list[dict]:
    merged = list(out.pivot_log) + [e for e in out.events if e.get("reason") != "initial"]
    merged.sort(key=lambda r: (r["iteration"], 0 if "event" in r else 1))
    return merged


# --------------------------------------------------------------------------- basis repair
def repair_basis(lp: LinearProgram, basis: Basis) -> tuple[Basis, dict | None]:
    """Return a factorizable basis close to ``basis``.

    A basis with the right count that factorizes is returned unchanged. Else
    the basic columns are ranked by a rank-revealing QR (column pivoting) and
    the dependent ones are replaced by logicals chosen from the complement
    space, preferring logicals that were already basic.
    """
    from .factor import Factor

    m, n = lp.m, lp.n
    status = np.concatenate([basis.col_status, basis.row_status])
    basic = np.flatnonzero(status == Status.BASIC)
    if basic.size == m:
        try:
            sim_B = _basis_matrix(lp, basic)
            Factor(sim_B)
            return basis, None
        except SingularBasis:
            pass
    # Structural repair first: a maximum matching of rows to candidate basic
    # columns (Hopcroft-Karp); unmatched rows get their logical. It is sparse,
    # fast at any size, and fixes the usual damage (rows or columns removed).
    repaired = _structural_repair(lp, status, basic)
    if repaired is not None:
        return repaired
    if m > DENSE_REPAIR_LIMIT:
        raise SingularBasis(
            f"basis needs numerical repair and the model has more than {DENSE_REPAIR_LIMIT} rows"
        )
    struct = basic[basic < n]
    M = lp.A[:, struct].toarray() if struct.size else np.zeros((m, 0))
    norms = np.linalg.norm(M, axis=0)
    norms[norms == 0] = 1.0
    keep_struct = np.zeros(0, dtype=np.int64)
    Q1 = np.zeros((m, 0))
    if struct.size:
        Q, R, piv = la.qr(M / norms, mode="economic", pivoting=True)
        diag = np.abs(np.diag(R))
        rank = int((diag > 1e-9 * max(1.0, diag.max(initial=0.0))).sum())
        rank = min(rank, m)
        keep_struct = struct[piv[:rank]]
        Q1 = Q[:, :rank]
    need = m - keep_struct.size
    P = np.eye(m) - Q1 @ Q1.T
    was_basic = status[n:] == Status.BASIC
    P[:, was_basic] *= 4.0  # prefer logicals that were basic before
    _, _, piv_rows = la.qr(P, mode="economic", pivoting=True)
    rows = piv_rows[:need]
    new_status = status.copy()
    new_status[basic] = -1  # decide below
    new_status[keep_struct] = Status.BASIC
    new_status[n + rows] = Status.BASIC
    dropped = np.flatnonzero(new_status == -1)
    new_status[dropped] = Status.AT_LOWER  # normalized to a valid bound below
    out = normalize_nonbasic(Basis(new_status[:n], new_status[n:]), lp)
    out = _natural_for(out, lp, dropped)
    report = {
        "repaired": True,
        "method": "rank_revealing_qr",
        **_repair_lists(lp, dropped, n + rows, status),
        "basic_before": int(basic.size),
    }
    Factor(
        _basis_matrix(lp, np.flatnonzero(np.concatenate([out.col_status, out.row_status]) == Status.BASIC))
    )
    return out, report


def _structural_repair(lp: LinearProgram, status: np.ndarray, basic: np.ndarray) -> tuple[Basis, dict] | None:
    from scipy.sparse.csgraph import maximum_bipartite_matching

    from .factor import Factor

    n = lp.n
    M = _basis_matrix(lp, basic)
    M.eliminate_zeros()
    match = maximum_bipartite_matching(M.tocsr(), perm_type="column")
    keep = basic[match[match >= 0]]
    rows = np.flatnonzero(match < 0)
    new_basic = np.union1d(keep, n + rows)
    try:
        Factor(_basis_matrix(lp, new_basic))
    except SingularBasis:
        return None
    new_status = status.copy()
    dropped = np.setdiff1d(basic, new_basic)
    new_status[dropped] = Status.AT_LOWER
    new_status[new_basic] = Status.BASIC
    out = _natural_for(Basis(new_status[:n], new_status[n:]), lp, dropped)
    report = {
        "repaired": True,
        "method": "structural",
        **_repair_lists(lp, dropped, n + rows, status),
        "basic_before": int(basic.size),
    }
    return out, report


def _repair_lists(lp: LinearProgram, dropped: np.ndarray, entered: np.ndarray, before: np.ndarray) -> dict:
    """Names of what a repair took out of and put into the basis (50 of each at most)."""
    n = lp.n
    entered = entered[before[entered] != Status.BASIC]
    return {
        "columns_dropped": [lp.col_names[j] for j in dropped if j < n][:50],
        "logicals_dropped": [lp.row_names[j - n] for j in dropped if j >= n][:50],
        "logicals_added": [lp.row_names[j - n] for j in entered if j >= n][:50],
    }


def _natural_for(basis: Basis, lp: LinearProgram, idx: np.ndarray) -> Basis:
    from .basis import nonbasic_status

    n = lp.n
    lower = np.concatenate([lp.col_lower, lp.row_lower])
    upper = np.concatenate([lp.col_upper, lp.row_upper])
    nat = nonbasic_status(lower[idx], upper[idx])
    st = np.concatenate([basis.col_status, basis.row_status])
    st[idx] = nat
    return Basis(st[:n], st[n:])


def _basis_matrix(lp: LinearProgram, basic: np.ndarray):
    import scipy.sparse as sp

    n, m = lp.n, lp.m
    struct = basic[basic < n]
    logical = basic[basic >= n] - n
    B = sp.hstack([lp.A[:, struct], -sp.identity(m, format="csc")[:, logical]], format="csc")
    return B
