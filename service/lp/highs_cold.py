"""Cold solves, ranging and warm-start references with HiGHS (highspy).

HiGHS is the engine's reference and fallback: ``solve_highs`` is the cold
solve behind ``solve(lp, SolveOptions(engine="highs"))``; ``highs_ranging``
is the reference the builtin ranging is tested against; and
``highs_warm_pivots`` measures how many iterations HiGHS itself needs from a
given basis, for benchmarks.

Signs: HiGHS reports row duals and column duals in the user's objective
sense, for minimization and maximization alike: row_dual[i] is
d objective / d (active bound of row i) and col_dual = c - A^T row_dual.
That is our convention (result.py), so they are copied as they come; tests
confirm it by finite differences for both senses.

Basis statuses: HiGHS's row statuses refer to the row activity's bounds
(kLower = activity at row_lower), as ours do. kZero is a nonbasic free
variable held at zero; kNonbasic carries no side, so the side is taken from
the value. A nonbasic variable with equal bounds becomes FIXED.

Ranging (HiGHS getRanging, as found on small worked examples, see
tests/lp/test_highs_cold.py):
- col_cost_dn / col_cost_up .value_: the interval of c[j] (the cost itself,
  not a change) over which the current basis stays optimal; +-inf when a
  side is unlimited. .objective_ is the objective at that end.
- row_bound_dn / row_bound_up .value_ for a row NONBASIC at a bound: the
  interval of that bound (the right-hand side) over which the basis stays
  primal feasible, i.e. the shadow price stays valid.
- row_bound_dn / row_bound_up .value_ for a BASIC row: the interval over which
  the row's ACTIVITY can be moved (as if the row were pinned at that value)
  while the basis stays feasible; it contains the current activity. This is
  not the classical "allowable increase/decrease" of a slack row (which would
  be [activity, +inf) for a <= row); ``highs_ranging`` passes HiGHS's values
  through unchanged, as our Ranging docstring describes ("or of its activity
  for a basic row").
- col_bound_dn / col_bound_up: the same for a column's value (not in our
  Ranging record).
The cost arrays that highspy returns can be longer than the column count;
only the first n entries are meaningful.
"""

from __future__ import annotations

import time

import highspy
import numpy as np

from .basis import Basis, Status, normalize_nonbasic
from .check import verify, verify_farkas, verify_ray
from .model import MAXIMIZE, LinearProgram
from .result import (
    ERROR,
    INFEASIBLE,
    ITERATION_LIMIT,
    OPTIMAL,
    TIME_LIMIT,
    UNBOUNDED,
    Ranging,
    SolveOptions,
    SolveResult,
)

_HS = highspy.HighsBasisStatus
_MS = highspy.HighsModelStatus

_STATUS_MAP = {
    _MS.kOptimal: OPTIMAL,
    _MS.kInfeasible: INFEASIBLE,
    _MS.kUnbounded: UNBOUNDED,
    _MS.kIterationLimit: ITERATION_LIMIT,
    _MS.kTimeLimit: TIME_LIMIT,
}

_TO_HIGHS = {
    Status.BASIC: _HS.kBasic,
    Status.AT_LOWER: _HS.kLower,
    Status.AT_UPPER: _HS.kUpper,
    Status.FIXED: _HS.kLower,
    Status.FREE: _HS.kZero,
}


# ------------------------------------------------------------------ plumbing


def to_highs_lp(lp: LinearProgram) -> highspy.HighsLp:
    """Our arrays as a HiGHS model (column-wise); infinities map to kHighsInf."""
    hlp = highspy.HighsLp()
    hlp.num_col_ = lp.n
    hlp.num_row_ = lp.m
    inf = float(highspy.kHighsInf)
    hlp.col_cost_ = lp.c
    hlp.col_lower_ = np.where(np.isneginf(lp.col_lower), -inf, lp.col_lower)
    hlp.col_upper_ = np.where(np.isposinf(lp.col_upper), inf, lp.col_upper)
    hlp.row_lower_ = np.where(np.isneginf(lp.row_lower), -inf, lp.row_lower)
    hlp.row_upper_ = np.where(np.isposinf(lp.row_upper), inf, lp.row_upper)
    hlp.offset_ = float(lp.offset)
    hlp.sense_ = highspy.ObjSense.kMaximize if lp.sense == MAXIMIZE else highspy.ObjSense.kMinimize
    mat = hlp.a_matrix_
    mat.format_ = highspy.MatrixFormat.kColwise
    mat.num_col_ = lp.n
    mat.num_row_ = lp.m
    mat.start_ = lp.A.indptr.astype(np.int32)
    mat.index_ = lp.A.indices.astype(np.int32)
    mat.value_ = lp.A.data
    return hlp


def _new_highs(lp: LinearProgram, options: SolveOptions, presolve: bool = True) -> highspy.Highs:
    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    h.setOptionValue("solver", "simplex")
    h.setOptionValue("presolve", "on" if presolve else "off")
    h.setOptionValue("time_limit", float(options.time_limit))
    h.setOptionValue("simplex_iteration_limit", int(options.max_iterations))
    h.setOptionValue("primal_feasibility_tolerance", float(options.primal_tol))
    h.setOptionValue("dual_feasibility_tolerance", float(options.dual_tol))
    status = h.passModel(to_highs_lp(lp))
    if status == highspy.HighsStatus.kError:
        raise ValueError("HiGHS rejected the model")
    return h


def import_basis(hbasis, lp: LinearProgram, x: np.ndarray, activity: np.ndarray) -> Basis | None:
    """A HiGHS basis as our Basis, or None when HiGHS holds no valid basis."""
    if not hbasis.valid or len(hbasis.col_status) != lp.n or len(hbasis.row_status) != lp.m:
        return None

    def convert(statuses, values, lower, upper) -> np.ndarray:
        codes = np.array([int(s) for s in statuses], dtype=np.int64)
        out = np.empty(codes.size, dtype=np.int8)
        out[codes == int(_HS.kBasic)] = Status.BASIC
        out[codes == int(_HS.kLower)] = Status.AT_LOWER
        out[codes == int(_HS.kUpper)] = Status.AT_UPPER
        out[codes == int(_HS.kZero)] = Status.FREE
        side = codes == int(_HS.kNonbasic)
        if side.any():
            # No side given: the nearer finite bound, else free.
            with np.errstate(invalid="ignore"):
                d_lo = np.where(np.isfinite(lower), np.abs(values - lower), np.inf)
                d_up = np.where(np.isfinite(upper), np.abs(values - upper), np.inf)
            pick = np.where(
                np.isinf(d_lo) & np.isinf(d_up),
                Status.FREE,
                np.where(d_lo <= d_up, Status.AT_LOWER, Status.AT_UPPER),
            )
            out[side] = pick[side]
        return out

    basis = Basis(
        convert(hbasis.col_status, x, lp.col_lower, lp.col_upper),
        convert(hbasis.row_status, activity, lp.row_lower, lp.row_upper),
    )
    # Equal bounds -> FIXED; a status pointing at an infinite bound is mended.
    return normalize_nonbasic(basis, lp)


def export_basis(basis: Basis) -> highspy.HighsBasis:
    """Our Basis as a HiGHS basis (FIXED goes to kLower, FREE to kZero)."""
    hb = highspy.HighsBasis()
    hb.col_status = [_TO_HIGHS[Status(int(s))] for s in basis.col_status]
    hb.row_status = [_TO_HIGHS[Status(int(s))] for s in basis.row_status]
    hb.valid = True
    return hb


def _iterations(h: highspy.Highs) -> int:
    return max(0, int(h.getInfo().simplex_iteration_count))


def _ray(getter) -> np.ndarray | None:
    status, has, values = getter()
    if status == highspy.HighsStatus.kError or not has:
        return None
    return np.asarray(values, dtype=np.float64).copy()


# ------------------------------------------------------------------ cold solve


def solve_highs(lp: LinearProgram, options: SolveOptions | None = None) -> SolveResult:
    """Cold simplex solve with HiGHS; a SolveResult in our conventions.

    HiGHS's "infeasible or unbounded" is resolved by re-solving without
    presolve and, if still open, by a feasibility solve (zero costs). For an
    infeasible model ``farkas`` holds HiGHS's dual ray oriented so that
    check.verify_farkas reports side "max<0"; for an unbounded one ``ray``
    holds its primal ray. Both are checked; ``message`` says when HiGHS gave
    none or when one fails the check. ``pivots`` sums the simplex iterations
    of every HiGHS run made.
    """
    options = options or SolveOptions()
    t0 = time.perf_counter()
    result = _solve(lp, options)
    result.timings["solve"] = time.perf_counter() - t0
    return result


def _empty_result(status: str, message: str) -> SolveResult:
    return SolveResult.without_solution(
        status, method="cold_highs", warm=False, reason="cold solve with HiGHS", message=message
    )


def _solve(lp: LinearProgram, options: SolveOptions) -> SolveResult:
    bad = lp.trivially_inconsistent_bounds()
    if bad:
        shown = ", ".join(bad[:5]) + (" ..." if len(bad) > 5 else "")
        return _empty_result(
            INFEASIBLE, f"lower bound above upper bound for {shown}; no row multipliers can certify this"
        )
    if lp.n == 0:
        return _solve_no_columns(lp)

    h = _new_highs(lp, options)
    h.run()
    model_status = h.getModelStatus()
    pivots = _iterations(h)
    notes: list[str] = []

    if model_status == _MS.kUnboundedOrInfeasible:
        h = _new_highs(lp, options, presolve=False)
        h.run()
        model_status = h.getModelStatus()
        pivots += _iterations(h)
        notes.append("HiGHS answered 'infeasible or unbounded'; re-solved without presolve")
    if model_status == _MS.kUnboundedOrInfeasible:
        feas = lp.copy()
        feas.c = np.zeros(lp.n)
        hf = _new_highs(feas, options, presolve=False)
        hf.run()
        pivots += _iterations(hf)
        fs = hf.getModelStatus()
        if fs == _MS.kOptimal:
            model_status = _MS.kUnbounded
            notes.append("a zero-cost solve found a feasible point, so the model is unbounded")
        elif fs == _MS.kInfeasible:
            model_status = _MS.kInfeasible
            h = hf  # its dual ray is a certificate for the same rows and bounds
            notes.append("a zero-cost solve proved the model infeasible")
        else:
            notes.append("a zero-cost solve did not settle feasibility")

    status = _STATUS_MAP.get(model_status, ERROR)
    result = _empty_result(status, "")
    result.pivots = pivots
    if status == ERROR:
        notes.append(f"HiGHS model status: {h.modelStatusToString(model_status)}")

    sol = h.getSolution()
    if sol.value_valid and status in (OPTIMAL, ITERATION_LIMIT, TIME_LIMIT):
        x = np.asarray(sol.col_value, dtype=np.float64).copy()
        result.x = x
        result.row_activity = np.asarray(sol.row_value, dtype=np.float64).copy()
        result.objective = lp.objective_value(x)
        if sol.dual_valid:
            result.shadow_price = np.asarray(sol.row_dual, dtype=np.float64).copy()
            result.reduced_cost = np.asarray(sol.col_dual, dtype=np.float64).copy()
        result.basis = import_basis(h.getBasis(), lp, x, result.row_activity)

    if status == OPTIMAL:
        result.check = verify(
            lp,
            result.x,
            result.row_activity,
            result.shadow_price,
            result.reduced_cost,
            basis=result.basis,
            tol=options.check_tol,
            objective=result.objective,
        )
        if options.ranging and result.basis is not None:
            result.ranging = _ranging_from(h, lp)
    elif status == INFEASIBLE:
        notes.append(_attach_farkas(result, h, lp, options))
    elif status == UNBOUNDED:
        notes.append(_attach_ray(result, h, lp, options))
    result.message = "; ".join(n for n in notes if n)
    return result


def _ray_or_rerun(result: SolveResult, h: highspy.Highs, lp: LinearProgram, options: SolveOptions, kind: str):
    """HiGHS's dual ("dual") or primal ("primal") ray. A presolve reduction can
    leave none; a plain simplex run without presolve then gives one."""
    getter, status = ("getDualRay", _MS.kInfeasible) if kind == "dual" else ("getPrimalRay", _MS.kUnbounded)
    ray = _ray(getattr(h, getter))
    if ray is None:
        h = _new_highs(lp, options, presolve=False)
        h.run()
        result.pivots += _iterations(h)
        if h.getModelStatus() == status:
            ray = _ray(getattr(h, getter))
    return ray


def _attach_farkas(result: SolveResult, h: highspy.Highs, lp: LinearProgram, options: SolveOptions) -> str:
    y = _ray_or_rerun(result, h, lp, options, "dual")
    if y is None:
        y = _single_row_certificate(lp)
    if y is None:
        return "HiGHS provided no dual ray, so no infeasibility certificate is given"
    chk = verify_farkas(lp, y, tol=options.check_tol)
    if chk["passed"] and chk["side"] == "min>0":
        y = -y
        chk = verify_farkas(lp, y, tol=options.check_tol)
    result.farkas = y
    result.check = {"farkas": chk}
    return "" if chk["passed"] else "HiGHS's dual ray fails the independent infeasibility check"


def _single_row_certificate(lp: LinearProgram) -> np.ndarray | None:
    """e_i for a row whose bounds no point of the column box can meet (interval
    arithmetic on the row's activity range), e.g. an empty row excluding 0."""
    A = lp.A.tocsr()
    pos = A.maximum(0)
    neg = A.minimum(0)
    lo, up = lp.col_lower, lp.col_upper  # already -inf / +inf where unbounded

    def dot(M, v):  # M @ v with 0 * inf = 0 (empty entries do not count)
        out = np.zeros(lp.m)
        coo = M.tocoo()
        with np.errstate(invalid="ignore"):
            np.add.at(out, coo.row, coo.data * v[coo.col])
        return out

    act_max = dot(pos, up) + dot(neg, lo)
    act_min = dot(pos, lo) + dot(neg, up)
    bad = np.flatnonzero((act_max < lp.row_lower) | (act_min > lp.row_upper))
    if bad.size == 0:
        return None
    y = np.zeros(lp.m)
    y[bad[0]] = 1.0
    return y


def _attach_ray(result: SolveResult, h: highspy.Highs, lp: LinearProgram, options: SolveOptions) -> str:
    d = _ray_or_rerun(result, h, lp, options, "primal")
    if d is None:
        d = _empty_column_ray(lp)
        if d is None:
            return "HiGHS provided no primal ray, so no unboundedness direction is given"
        note = "HiGHS provided no primal ray; the direction given is an empty column with an improving cost"
    else:
        note = ""
    chk = verify_ray(lp, d, tol=options.check_tol)
    result.ray = d
    result.check = {"ray": chk}
    return note if chk["passed"] else "the primal ray fails the independent unboundedness check"


def _empty_column_ray(lp: LinearProgram) -> np.ndarray | None:
    """A column in no row whose cost improves without limit (presolve removes these before any ray exists)."""
    empty = np.diff(lp.A.indptr) == 0
    c_min = lp.sense * lp.c
    up = np.flatnonzero(empty & (c_min < 0) & np.isposinf(lp.col_upper))
    down = np.flatnonzero(empty & (c_min > 0) & np.isneginf(lp.col_lower))
    if up.size == 0 and down.size == 0:
        return None
    d = np.zeros(lp.n)
    if up.size:
        d[up[0]] = 1.0
    else:
        d[down[0]] = -1.0
    return d


def _solve_no_columns(lp: LinearProgram) -> SolveResult:
    """No columns: every row's activity is 0, feasible iff each row admits 0."""
    activity = np.zeros(lp.m)
    ok = (lp.row_lower <= 0.0) & (lp.row_upper >= 0.0)
    if not ok.all():
        result = _empty_result(INFEASIBLE, "the model has no columns and some row excludes 0")
        i = int(np.flatnonzero(~ok)[0])
        y = np.zeros(lp.m)
        y[i] = 1.0  # z = A^T y is empty; -y_i * r_i over the row's range stays < 0 or > 0
        chk = verify_farkas(lp, y)
        if chk["side"] == "min>0":
            y = -y
            chk = verify_farkas(lp, y)
        result.farkas = y
        result.check = {"farkas": chk}
        return result
    result = _empty_result(OPTIMAL, "the model has no columns")
    result.x = np.zeros(0)
    result.row_activity = activity
    result.objective = float(lp.offset)
    result.shadow_price = np.zeros(lp.m)
    result.reduced_cost = np.zeros(0)
    result.basis = Basis(np.zeros(0, dtype=np.int8), np.full(lp.m, Status.BASIC, dtype=np.int8))
    result.check = verify(
        lp, result.x, activity, result.shadow_price, result.reduced_cost, basis=result.basis
    )
    return result


# ------------------------------------------------------------------ ranging


def _ranging_from(h: highspy.Highs, lp: LinearProgram) -> Ranging | None:
    status, rng = h.getRanging()
    if status == highspy.HighsStatus.kError or not rng.valid:
        return None

    def values(rec, size: int) -> np.ndarray:
        arr = np.asarray(rec.value_, dtype=np.float64)[:size] + 0.0  # + 0.0 turns -0.0 into 0.0
        arr[arr >= float(highspy.kHighsInf)] = np.inf
        arr[arr <= -float(highspy.kHighsInf)] = -np.inf
        return arr

    return Ranging(
        cost_lower=values(rng.col_cost_dn, lp.n),
        cost_upper=values(rng.col_cost_up, lp.n),
        rhs_lower=values(rng.row_bound_dn, lp.m),
        rhs_upper=values(rng.row_bound_up, lp.m),
    )


def highs_ranging(lp: LinearProgram, options: SolveOptions | None = None) -> Ranging:
    """Cost and right-hand-side ranges from HiGHS at its optimal basis.

    Values as described in the module docstring, in the user's sense (cost
    values, bound values; +-inf for unlimited sides). Raises ValueError when
    the model has no optimal basis.
    """
    options = options or SolveOptions()
    h = _new_highs(lp, options)
    h.run()
    if h.getModelStatus() != _MS.kOptimal:
        raise ValueError(f"no optimal basis to range: {h.modelStatusToString(h.getModelStatus())}")
    rng = _ranging_from(h, lp)
    if rng is None:
        raise ValueError("HiGHS could not compute ranging")
    return rng


# ------------------------------------------------------------------ warm reference


def highs_warm_pivots(
    lp: LinearProgram, basis: Basis, options: SolveOptions | None = None
) -> tuple[int, float]:
    """HiGHS's own warm start from ``basis``: (simplex iterations, objective).

    The basis is loaded with setBasis and HiGHS runs its simplex without
    presolve (presolve would discard the basis). Returns the objective in the
    user's sense (nan when HiGHS ends without an optimum). Raises ValueError
    when the basis does not fit the model or HiGHS refuses it.
    """
    options = options or SolveOptions()
    if basis.n != lp.n or basis.m != lp.m:
        raise ValueError(f"basis is {basis.n} x {basis.m}, model is {lp.n} x {lp.m}")
    h = _new_highs(lp, options, presolve=False)
    if h.setBasis(export_basis(normalize_nonbasic(basis, lp))) == highspy.HighsStatus.kError:
        raise ValueError("HiGHS refused the basis")
    h.run()
    iterations = _iterations(h)
    if h.getModelStatus() != _MS.kOptimal:
        return iterations, float("nan")
    x = np.asarray(h.getSolution().col_value, dtype=np.float64)
    return iterations, lp.objective_value(x)
