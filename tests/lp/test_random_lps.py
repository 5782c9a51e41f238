"""Property tests: the engine against scipy.optimize.linprog(method="highs") on random small LPs.

Reference for every status and objective here: scipy.optimize.linprog(method="highs"), presolve off
so that it tells infeasible from unbounded. Beyond agreeing with it, every optimal answer is checked
from the data (primal feasibility, reduced costs = c - A'y, dual signs per the conventions in
service/lp/result.py), and every infeasible / unbounded answer's certificate is checked both by
service.lp.check and by an independent interval argument written below.

Families (built so the expected outcome is known by construction, and confirmed by the reference):
  feasible   all columns boxed (some fixed, some negative), rows built around a known point
  mixed      any column bounds (free, one-sided, boxed, fixed), rows around a known point
  infeasible a feasible model plus rows that contradict the bounds or other rows
  unbounded  a known improving ray in the recession cone
  degenerate a vertex with many tight rows at zero RHS, duplicated rows, tied costs
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

from service.lp import MAXIMIZE, MINIMIZE, LinearProgram, SolveOptions, remap, reoptimize, solve

# HOTBASIS_PROPERTY_EXAMPLES raises the count for a longer bug hunt; the default stays under a minute.
EXAMPLES = int(os.environ.get("HOTBASIS_PROPERTY_EXAMPLES", "60"))
SETTINGS = settings(
    max_examples=EXAMPLES, deadline=None, suppress_health_check=[HealthCheck.too_slow], print_blob=True
)
SINGLE = settings(SETTINGS, max_examples=max(1, EXAMPLES // 2))
INF = np.inf
BOXED = ("box", "fixed", "neg_box")
ANY_COL = ("box", "fixed", "neg_box", "lower", "upper", "free")
ROW_TYPES = ("eq", "le", "ge", "range", "free")


# --------------------------------------------------------------------------- reference and checks
def reference(lp: LinearProgram) -> tuple[str, float | None]:
    """Reference solve: scipy.optimize.linprog(method="highs").

    Presolve off first, so that it tells infeasible from unbounded; on the rare model where HiGHS then
    ends with an unknown status (seen with several free rows), once more with presolve on.
    """
    A = lp.A.tocsr()
    eq = lp.row_lower == lp.row_upper
    up = ~eq & np.isfinite(lp.row_upper)
    lo = ~eq & np.isfinite(lp.row_lower)
    A_ub = sp.vstack([A[up], -A[lo]], format="csr")
    b_ub = np.concatenate([lp.row_upper[up], -lp.row_lower[lo]])
    for presolve in (False, True):
        res = linprog(
            lp.sense * lp.c,
            A_ub=A_ub if A_ub.shape[0] else None,
            b_ub=b_ub if A_ub.shape[0] else None,
            A_eq=A[eq] if eq.any() else None,
            b_eq=lp.row_lower[eq] if eq.any() else None,
            bounds=list(
                zip(
                    np.where(np.isfinite(lp.col_lower), lp.col_lower, None),
                    np.where(np.isfinite(lp.col_upper), lp.col_upper, None),
                )
            ),  # fmt: skip
            method="highs",
            options={"presolve": presolve},
        )
        if res.status in (0, 2, 3):
            break
    status = {0: "optimal", 2: "infeasible", 3: "unbounded"}.get(res.status, f"reference status {res.status}")
    objective = float(lp.sense * res.fun + lp.offset) if res.status == 0 else None
    return status, objective


def close(a: float, b: float, rel: float = 1e-6) -> bool:
    return abs(a - b) <= rel * max(1.0, abs(a), abs(b))


def data_scale(lp: LinearProgram) -> float:
    finite = np.concatenate([lp.col_lower, lp.col_upper, lp.row_lower, lp.row_upper])
    finite = finite[np.isfinite(finite)]
    return max(1.0, np.abs(lp.A.data).max(initial=0.0), np.abs(finite).max(initial=0.0), np.abs(lp.c).max())


def assert_optimal_kkt(lp: LinearProgram, res, tol: float = 1e-6) -> None:
    """Optimality from the data alone (sign conventions of service/lp/result.py)."""
    scale = data_scale(lp)
    t = tol * scale * (1 + lp.n)
    x, y, d = res.x, res.shadow_price, res.reduced_cost
    act = lp.A @ x
    assert np.all(x >= lp.col_lower - t) and np.all(x <= lp.col_upper + t), "column bound violated"
    assert np.all(act >= lp.row_lower - t) and np.all(act <= lp.row_upper + t), "row bound violated"
    assert np.allclose(res.row_activity, act, atol=t), "row_activity is not A @ x"
    assert np.allclose(d, lp.c - lp.A.T @ y, atol=t), "reduced_cost is not c - A'shadow_price"
    assert close(res.objective, lp.objective_value(x)), "objective is not c @ x + offset"
    s = lp.sense
    # Moving a value off its lower bound must not pay (and likewise for the upper bound).
    assert np.all(s * d[x > lp.col_lower + t] <= t), (
        "reduced cost sign wrong for a column above its lower bound"
    )
    assert np.all(s * d[x < lp.col_upper - t] >= -t), (
        "reduced cost sign wrong for a column below its upper bound"
    )
    assert np.all(s * y[act > lp.row_lower + t] <= t), (
        "shadow price sign wrong for a row above its lower bound"
    )
    assert np.all(s * y[act < lp.row_upper - t] >= -t), (
        "shadow price sign wrong for a row below its upper bound"
    )
    assert res.basis is not None and res.basis.basic_count() == lp.m, "basis does not have m basics"


def _interval(coef: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> tuple[float, float]:
    """Range of coef @ v over lower <= v <= upper (infinite ends where a bound is missing)."""
    nz = coef != 0
    coef, lower, upper = coef[nz], lower[nz], upper[nz]
    with np.errstate(invalid="ignore"):
        a, b = coef * lower, coef * upper
    lo = np.minimum(a, b)
    hi = np.maximum(a, b)
    return float(lo.sum()), float(hi.sum())


def farkas_proves_infeasible(lp: LinearProgram, y: np.ndarray, tol: float = 1e-7) -> bool:
    """Independent check of row multipliers y (either sign convention).

    Every feasible x has y @ (A x) inside the interval allowed by the row bounds and inside the
    interval reachable over the column box; y proves infeasibility when the two do not meet.
    """
    y = np.asarray(y, dtype=float)
    z = lp.A.T @ y
    # Rounding leaves entries of A'y near 1e-16 where the exact certificate has zeros; against an
    # infinite bound they would swamp the argument, so they count as zero.
    z[np.abs(z) <= 1e-9 * max(1.0, np.abs(y).max()) * data_scale(lp)] = 0.0
    col_lo, col_hi = _interval(z, lp.col_lower, lp.col_upper)
    row_lo, row_hi = _interval(y, lp.row_lower, lp.row_upper)
    gap_tol = tol * max(1.0, np.abs(y).max()) * data_scale(lp) * (1 + lp.m + lp.n)
    return col_hi < row_lo - gap_tol or col_lo > row_hi + gap_tol


def ray_proves_unbounded(lp: LinearProgram, ray: np.ndarray, tol: float = 1e-7) -> bool:
    """Independent check: the ray stays feasible forever and improves the objective (model feasible)."""
    r = np.asarray(ray, dtype=float)
    t = tol * max(1.0, np.abs(r).max()) * data_scale(lp)
    Ar = lp.A @ r
    ok = np.all(r[np.isfinite(lp.col_lower)] >= -t) and np.all(r[np.isfinite(lp.col_upper)] <= t)
    ok &= np.all(Ar[np.isfinite(lp.row_lower)] >= -t) and np.all(Ar[np.isfinite(lp.row_upper)] <= t)
    return bool(ok) and lp.sense * float(lp.c @ r) < -t * (1 + lp.n)


def reproducer(lp: LinearProgram) -> str:
    """The LP's arrays, printed so a failing case can be pasted back into Python."""
    with np.printoptions(threshold=10_000, linewidth=200):
        return (
            f"\nA = {lp.A.toarray().tolist()}\nc = {lp.c.tolist()}\n"
            f"col_lower = {lp.col_lower.tolist()}\ncol_upper = {lp.col_upper.tolist()}\n"
            f"row_lower = {lp.row_lower.tolist()}\nrow_upper = {lp.row_upper.tolist()}\nsense = {lp.sense}\n"
        ).replace("inf", "INF")


def check_against_reference(lp: LinearProgram, res, *, context: str) -> None:
    """The engine's answer agrees with the reference and carries a valid proof of what it claims."""
    expected, ref_obj = reference(lp)
    where = (
        f"{context}: engine {res.status} ({res.method}, {res.message or res.reason}), reference {expected}"
    )
    where += reproducer(lp)
    assert res.fallback is None, f"fell back to HiGHS: {res.fallback}; {where}"
    assert res.status == expected, where
    from service.lp.check import verify_farkas, verify_ray

    if expected == "optimal":
        assert close(res.objective, ref_obj), f"objective {res.objective} vs reference {ref_obj}; {where}"
        assert bool(res.check.get("passed")), f"check {res.check}; {where}"
        assert_optimal_kkt(lp, res)
    elif expected == "infeasible":
        assert res.farkas is not None, where
        assert bool(verify_farkas(lp, res.farkas).get("passed")), where
        assert farkas_proves_infeasible(lp, res.farkas), f"certificate {res.farkas.tolist()}; {where}"
    elif expected == "unbounded":
        assert res.ray is not None, where
        assert bool(verify_ray(lp, res.ray).get("passed")), where
        assert ray_proves_unbounded(lp, res.ray), f"ray {res.ray.tolist()}; {where}"


# --------------------------------------------------------------------------- generators
def _col_bounds(kind: str, rng: np.random.Generator) -> tuple[float, float, float]:
    """(lower, upper, a point inside) for one column kind; small integers keep the references exact."""
    if kind == "box":
        lo = int(rng.integers(-5, 4))
        hi = lo + int(rng.integers(1, 8))
        return lo, hi, int(rng.integers(lo, hi + 1))
    if kind == "fixed":
        v = int(rng.integers(-4, 5))
        return v, v, v
    if kind == "neg_box":
        hi = -int(rng.integers(1, 4))
        lo = hi - int(rng.integers(1, 6))
        return lo, hi, int(rng.integers(lo, hi + 1))
    if kind == "lower":
        lo = int(rng.integers(-3, 4))
        return lo, INF, lo + int(rng.integers(0, 4))
    if kind == "upper":
        hi = int(rng.integers(-3, 4))
        return -INF, hi, hi - int(rng.integers(0, 4))
    return -INF, INF, int(rng.integers(-4, 5))  # free


def _matrix(m: int, n: int, density: float, rng: np.random.Generator) -> np.ndarray:
    A = rng.integers(-5, 6, (m, n)).astype(float)
    A[rng.random((m, n)) > density] = 0.0
    return A


def _rows_around(act: np.ndarray, kinds: list[str], rng: np.random.Generator, zero_slack: float):
    """Row bounds that hold at activity ``act``; with probability zero_slack a side is tight."""
    lower, upper = np.full(act.size, -INF), np.full(act.size, INF)
    for i, kind in enumerate(kinds):
        s1 = 0 if rng.random() < zero_slack else int(rng.integers(1, 6))
        s2 = 0 if rng.random() < zero_slack else int(rng.integers(1, 6))
        if kind == "eq":
            lower[i] = upper[i] = act[i]
        elif kind == "le":
            upper[i] = act[i] + s1
        elif kind == "ge":
            lower[i] = act[i] - s1
        elif kind == "range":
            lower[i], upper[i] = act[i] - s1, act[i] + s2
    return lower, upper


def _lp(A, c, cl, cu, rl, ru, sense, prefix="") -> LinearProgram:
    m, n = A.shape
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=c,
        col_lower=cl,
        col_upper=cu,
        row_lower=rl,
        row_upper=ru,
        sense=sense,
        col_names=[f"{prefix}x{j}" for j in range(n)],
        row_names=[f"{prefix}r{i}" for i in range(m)],
    )


@st.composite
def point_lps(draw, col_kinds=BOXED, zero_slack: float = 0.3):
    """Feasible by construction: rows are built around a known point inside the column bounds."""
    m = draw(st.integers(1, 12))
    n = draw(st.integers(1, 12))
    cols = draw(st.lists(st.sampled_from(col_kinds), min_size=n, max_size=n))
    rows = draw(st.lists(st.sampled_from(ROW_TYPES), min_size=m, max_size=m))
    sense = draw(st.sampled_from([MINIMIZE, MAXIMIZE]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    bounds = [_col_bounds(kind, rng) for kind in cols]
    cl, cu, x0 = (np.array(v, dtype=float) for v in zip(*bounds))
    A = _matrix(m, n, draw(st.sampled_from([0.3, 0.6, 1.0])), rng)
    rl, ru = _rows_around(A @ x0, rows, rng, zero_slack)
    c = rng.integers(-9, 10, n).astype(float)
    return _lp(A, c, cl, cu, rl, ru, sense), x0


@st.composite
def feasible_lps(draw):
    return draw(point_lps(col_kinds=BOXED))[0]


@st.composite
def mixed_lps(draw):
    return draw(point_lps(col_kinds=ANY_COL))[0]


@st.composite
def degenerate_lps(draw):
    """A vertex at the origin with many rows tight there (zero RHS), duplicated rows, tied costs."""
    m = draw(st.integers(2, 12))
    n = draw(st.integers(2, 12))
    sense = draw(st.sampled_from([MINIMIZE, MAXIMIZE]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    u = float(rng.integers(1, 4))
    cl = np.where(rng.random(n) < 0.5, 0.0, -u)
    cu = np.full(n, u)
    A = _matrix(m, n, 0.6, rng)
    dup = rng.integers(0, m, m // 3)
    A[m - dup.size :] = A[dup] * rng.choice([1.0, 2.0], (dup.size, 1))  # parallel rows
    kinds = [str(k) for k in rng.choice(["le", "ge", "eq"], m, p=[0.45, 0.45, 0.1])]
    rl, ru = _rows_around(np.zeros(m), kinds, rng, zero_slack=0.9)
    c = rng.choice([-1.0, 0.0, 1.0], n)
    return _lp(A, c, cl, cu, rl, ru, sense)


@st.composite
def infeasible_lps(draw):
    """A feasible model plus rows that no point can satisfy, in one of three ways."""
    lp, _ = draw(point_lps(col_kinds=BOXED))
    way = draw(st.sampled_from(["against_bounds", "pair", "combination"]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    A = lp.A.toarray()
    rl, ru = lp.row_lower.copy(), lp.row_upper.copy()
    if way == "against_bounds":
        # A row asking for more than the column box can give.
        a = rng.integers(-5, 6, lp.n).astype(float)
        a[rng.integers(lp.n)] = float(rng.choice([-3, 3]))
        _, hi = _interval(a, lp.col_lower, lp.col_upper)
        new_rows, new_lo, new_up = [a], [hi + 1 + int(rng.integers(0, 3))], [INF]
    elif way == "pair":
        # a.x <= b and a.x >= b + 1.
        a = rng.integers(-5, 6, lp.n).astype(float)
        a[rng.integers(lp.n)] = 1.0
        b = float(rng.integers(-3, 4))
        new_rows, new_lo, new_up = [a, a], [-INF, b + 1], [b, INF]
    else:
        # Equalities whose weighted sum contradicts a further equality.
        k = int(rng.integers(1, 4))
        rows = rng.integers(-5, 6, (k, lp.n)).astype(float)
        rhs = rng.integers(-6, 7, k).astype(float)
        w = rng.integers(1, 4, k).astype(float)
        new_rows = list(rows) + [w @ rows]
        new_lo = list(rhs) + [float(w @ rhs) + 1]
        new_up = list(new_lo)
    A = np.vstack([A, np.array(new_rows)])
    rl = np.concatenate([rl, new_lo])
    ru = np.concatenate([ru, new_up])
    return _lp(A, lp.c, lp.col_lower, lp.col_upper, rl, ru, lp.sense)


@st.composite
def unbounded_lps(draw):
    """A feasible model with a known direction d >= 0 that stays feasible and improves forever."""
    m = draw(st.integers(1, 12))
    n = draw(st.integers(1, 12))
    sense = draw(st.sampled_from([MINIMIZE, MAXIMIZE]))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    on_ray = rng.random(n) < 0.4
    on_ray[rng.integers(n)] = True
    kinds = [str(rng.choice(["lower", "free"])) if r else str(rng.choice(ANY_COL)) for r in on_ray]
    cl, cu, x0 = (np.array(v, dtype=float) for v in zip(*[_col_bounds(k, rng) for k in kinds]))
    d = np.where(on_ray, rng.integers(1, 3, n), 0).astype(float)
    A = _matrix(m, n, 0.5, rng)
    Ad = A @ d
    rows = []
    for i in range(m):
        allowed = ["ge", "free"] if Ad[i] > 0 else ["le", "free"] if Ad[i] < 0 else list(ROW_TYPES)
        rows.append(str(rng.choice(allowed)))
    rl, ru = _rows_around(A @ x0, rows, rng, zero_slack=0.3)
    c = rng.integers(-9, 10, n).astype(float)
    k = int(np.flatnonzero(on_ray)[0])
    rest = sense * (c @ d - c[k] * d[k])
    c[k] = sense * np.floor((-1 - rest) / d[k])  # makes sense * (c @ d) <= -1
    return _lp(A, c, cl, cu, rl, ru, sense)


# --------------------------------------------------------------------------- cold builtin
BUILTIN = SolveOptions(engine="builtin")


@SETTINGS
@given(feasible_lps())
def test_cold_builtin_feasible_bounded(lp):
    assert reference(lp)[0] == "optimal"  # by construction; guards the generator
    check_against_reference(lp, solve(lp, BUILTIN), context="cold builtin, feasible family")


@SETTINGS
@given(mixed_lps())
def test_cold_builtin_mixed_bounds(lp):
    assert reference(lp)[0] in ("optimal", "unbounded")  # feasible by construction
    check_against_reference(lp, solve(lp, BUILTIN), context="cold builtin, mixed family")


@SETTINGS
@given(infeasible_lps())
def test_cold_builtin_infeasible(lp):
    assert reference(lp)[0] == "infeasible"
    check_against_reference(lp, solve(lp, BUILTIN), context="cold builtin, infeasible family")


@SETTINGS
@given(unbounded_lps())
def test_cold_builtin_unbounded(lp):
    assert reference(lp)[0] == "unbounded"
    check_against_reference(lp, solve(lp, BUILTIN), context="cold builtin, unbounded family")


@SETTINGS
@given(degenerate_lps())
def test_cold_builtin_degenerate(lp):
    assert reference(lp)[0] == "optimal"
    check_against_reference(lp, solve(lp, BUILTIN), context="cold builtin, degenerate family")


# --------------------------------------------------------------------------- warm changes
CHANGES = ("add_row", "cut_row", "tighten_bound", "move_rhs", "change_costs", "add_column")
STRUCTURAL = ("remove_row", "remove_column", "change_coefficient")


def change_model(
    lp: LinearProgram, x: np.ndarray, kinds: list[str], rng: np.random.Generator
) -> LinearProgram:
    """Apply the listed changes to a copy of ``lp``; names of kept rows and columns stay.

    ``x`` (the current optimum) is carried along so that cuts and tightened bounds are aimed at it.
    """
    A = lp.A.toarray()
    x = np.asarray(x, dtype=float).copy()
    c, cl, cu = lp.c.copy(), lp.col_lower.copy(), lp.col_upper.copy()
    rl, ru = lp.row_lower.copy(), lp.row_upper.copy()
    col_names, row_names = list(lp.col_names), list(lp.row_names)
    for step, kind in enumerate(kinds):
        m, n = A.shape
        if kind in ("add_row", "cut_row"):
            a = rng.integers(-5, 6, n).astype(float)
            a[rng.integers(n)] = float(rng.choice([-2, 1, 3]))
            act = float(a @ x)
            if kind == "cut_row":  # the current optimum violates it
                lo, up = -INF, np.floor(act) - 1 - int(rng.integers(0, 3))
            else:
                lo, up = act - int(rng.integers(0, 4)), act + int(rng.integers(0, 4))
            A = np.vstack([A, a])
            rl, ru = np.append(rl, lo), np.append(ru, up)
            row_names.append(f"new_r{step}")
        elif kind == "tighten_bound":
            j = int(rng.integers(n))
            if rng.random() < 0.5:
                cu[j] = min(cu[j], np.floor(x[j]) - int(rng.integers(0, 2)))
                cl[j] = min(cl[j], cu[j])
            else:
                cl[j] = max(cl[j], np.ceil(x[j]) + int(rng.integers(0, 2)))
                cu[j] = max(cu[j], cl[j])
        elif kind == "move_rhs":
            i = int(rng.integers(m))
            shift = float(rng.choice([-3, -2, -1, 1, 2, 3]))
            if np.isfinite(rl[i]):
                rl[i] += shift
            if np.isfinite(ru[i]):
                ru[i] += shift
        elif kind == "change_costs":
            picked = rng.random(n) < 0.5
            picked[rng.integers(n)] = True
            c[picked] = rng.integers(-9, 10, int(picked.sum())).astype(float)
        elif kind == "add_column":
            col = rng.integers(-5, 6, m).astype(float)
            col[rng.random(m) > 0.6] = 0.0
            A = np.hstack([A, col[:, None]])
            lo = float(rng.integers(-3, 1))
            c = np.append(c, float(rng.integers(-9, 10)))
            cl, cu = np.append(cl, lo), np.append(cu, lo + float(rng.integers(1, 6)))
            x = np.append(x, lo)
            col_names.append(f"new_x{step}")
        elif kind == "remove_row" and m > 1:
            i = int(rng.integers(m))
            A, rl, ru = np.delete(A, i, axis=0), np.delete(rl, i), np.delete(ru, i)
            del row_names[i]
        elif kind == "remove_column" and n > 1:
            j = int(rng.integers(n))
            A, c, cl, cu, x = (np.delete(v, j, axis=-1) for v in (A, c, cl, cu, x))
            del col_names[j]
        elif kind == "change_coefficient":
            i, j = int(rng.integers(m)), int(rng.integers(n))
            A[i, j] = float(rng.choice([v for v in range(-5, 6) if v != A[i, j]]))
    return LinearProgram(
        A=sp.csc_matrix(A), c=c, col_lower=cl, col_upper=cu, row_lower=rl, row_upper=ru, sense=lp.sense,
        col_names=col_names, row_names=row_names,
    )  # fmt: skip


def _warm(lp: LinearProgram, seed: int, kinds: list[str], cold: SolveOptions) -> None:
    first = solve(lp, cold)
    assert first.status == "optimal", f"cold solve of the starting model: {first.status}{reproducer(lp)}"
    rng = np.random.default_rng(seed)
    changed = change_model(lp, first.x, kinds, rng)
    basis, _ = remap(first.basis, lp.col_names, lp.row_names, changed)
    res = reoptimize(changed, basis, SolveOptions())
    context = f"warm after {kinds} from a {cold.engine} basis; starting model:{reproducer(lp)}changed model"
    assert res.warm or res.fallback, f"reoptimize did not say warm; {context}"
    check_against_reference(changed, res, context=context)


change_lists = st.lists(st.sampled_from(CHANGES), min_size=1, max_size=4)


@SETTINGS
@given(feasible_lps(), st.integers(0, 2**32 - 1), change_lists)
def test_warm_after_changes_from_a_highs_basis(lp, seed, kinds):
    _warm(lp, seed, kinds, SolveOptions())


@SETTINGS
@given(mixed_lps(), st.integers(0, 2**32 - 1), change_lists)
def test_warm_after_changes_mixed_bounds(lp, seed, kinds):
    if reference(lp)[0] != "optimal":
        return  # an unbounded starting model has no basis to carry over
    _warm(lp, seed, kinds, SolveOptions())


@SETTINGS
@given(degenerate_lps(), st.integers(0, 2**32 - 1), change_lists)
def test_warm_after_changes_degenerate(lp, seed, kinds):
    _warm(lp, seed, kinds, SolveOptions())


@SETTINGS
@given(feasible_lps(), st.integers(0, 2**32 - 1), change_lists)
def test_warm_after_changes_from_a_builtin_basis(lp, seed, kinds):
    _warm(lp, seed, kinds, BUILTIN)


@SETTINGS
@given(
    feasible_lps(),
    st.integers(0, 2**32 - 1),
    st.lists(st.sampled_from(CHANGES + STRUCTURAL), min_size=1, max_size=3),
)
def test_warm_after_removals_and_coefficient_changes(lp, seed, kinds):
    _warm(lp, seed, kinds, SolveOptions())


@pytest.mark.parametrize("kind", CHANGES + STRUCTURAL)
@SINGLE
@given(lp=feasible_lps(), seed=st.integers(0, 2**32 - 1))
def test_warm_single_change(kind, lp, seed):
    _warm(lp, seed, [kind], SolveOptions())
