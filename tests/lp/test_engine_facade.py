"""Engine facade (service/lp/engine.py): basis repair, limits and fallback, certificates, dual signs.

Outside checks:
- reference optimum: a cold solve of the same model with HiGHS (via highspy), named beside each use;
- Netlib published optima (shared/data/netlib/optimal.csv) where a Netlib problem is used;
- shadow prices and reduced costs against finite differences of re-solved models (sign convention
  of service/lp/result.py: shadow_price = d objective / d active bound of the row,
  reduced_cost = c - A' shadow_price, both in the model's own sense).
"""

from __future__ import annotations

import zlib
from functools import lru_cache

import numpy as np
import pytest
import scipy.sparse as sp

from service.lp import (
    MAXIMIZE,
    MINIMIZE,
    Basis,
    LinearProgram,
    SolveOptions,
    Status,
    remap,
    reoptimize,
    solve,
)
from service.lp.check import verify_farkas, verify_ray
from service.lp.engine import repair_basis
from service.lp.factor import Factor, SingularBasis
from service.lp.highs_cold import solve_highs
from service.lp.mps import read_mps
from tests.lp.changes import _rebuild
from tests.lp.netlib import netlib_problems

INF = np.inf
NETLIB = {p.name: p for p in netlib_problems()}
needs_netlib = pytest.mark.skipif(not NETLIB, reason="shared Netlib data not found")
REPAIR_SET = ["afiro", "adlittle", "sc50a", "blend", "kb2", "share2b"]


@lru_cache(maxsize=None)
def netlib(name: str) -> LinearProgram:
    return read_mps(NETLIB[name].path)


@lru_cache(maxsize=None)
def highs_optimum(name: str):
    """Reference solve: HiGHS via highspy (cold)."""
    res = solve(netlib(name))
    assert res.status == "optimal"
    return res


def rel(a: float, b: float) -> float:
    return abs(a - b) / max(1.0, abs(b))


def basic_matrix(lp: LinearProgram, basis: Basis) -> sp.csc_matrix:
    status = np.concatenate([basis.col_status, basis.row_status])
    basic = np.flatnonzero(status == Status.BASIC)
    struct = basic[basic < lp.n]
    logical = basic[basic >= lp.n] - lp.n
    return sp.hstack([lp.A[:, struct], -sp.identity(lp.m, format="csc")[:, logical]], format="csc")


def assert_repaired_basis_works(lp: LinearProgram, repaired: Basis) -> None:
    assert repaired.basic_count() == lp.m
    Factor(basic_matrix(lp, repaired))  # raises SingularBasis if the repair failed
    res = reoptimize(lp, repaired, SolveOptions(fallback=False))
    ref = solve(lp)  # reference solve: HiGHS via highspy
    assert res.status == ref.status == "optimal"
    assert res.check["passed"]
    assert rel(res.objective, ref.objective) <= 1e-6


# ------------------------------------------------------------------ repair_basis
@needs_netlib
@pytest.mark.parametrize("name", REPAIR_SET)
def test_repair_after_binding_row_removed(name):
    """Too many basics: the removed row's logical was nonbasic, so m_old basics remain for m_old - 1 rows."""
    lp = netlib(name)
    base = highs_optimum(name)
    binding = np.flatnonzero(base.basis.row_status != Status.BASIC)
    start = zlib.crc32(name.encode()) % binding.size
    for k in range(binding.size):  # the first binding row whose removal keeps the model bounded
        i = int(binding[(start + k) % binding.size])
        keep = np.r_[0:i, i + 1 : lp.m]
        changed = _rebuild(
            lp,
            A=lp.A[keep, :].tocsc(),
            row_lower=lp.row_lower[keep],
            row_upper=lp.row_upper[keep],
            row_names=[lp.row_names[k] for k in keep],
        )
        if solve(changed).status == "optimal":  # reference solve: HiGHS via highspy
            break
    carried, report = remap(base.basis, lp.col_names, lp.row_names, changed)
    assert report["rows_removed"] == 1
    assert carried.basic_count() == changed.m + 1
    repaired, rep = repair_basis(changed, carried)
    assert rep is not None and rep["repaired"]
    assert rep["basic_before"] == changed.m + 1
    assert_repaired_basis_works(changed, repaired)
    # the repair only demotes: every basic in the repaired basis was basic before, or is a logical
    was = np.concatenate([carried.col_status, carried.row_status]) == Status.BASIC
    now = np.concatenate([repaired.col_status, repaired.row_status]) == Status.BASIC
    assert not (now[: changed.n] & ~was[: changed.n]).any()


@needs_netlib
@pytest.mark.parametrize("name", REPAIR_SET)
def test_repair_after_basic_column_removed(name):
    """Too few basics: a basic structural column disappears."""
    lp = netlib(name)
    base = highs_optimum(name)
    basic_cols = np.flatnonzero(base.basis.col_status == Status.BASIC)
    start = zlib.crc32(name.encode()) % basic_cols.size
    for k in range(basic_cols.size):  # the first basic column whose removal keeps the model solvable
        j = int(basic_cols[(start + k) % basic_cols.size])
        keep = np.r_[0:j, j + 1 : lp.n]
        changed = _rebuild(
            lp,
            A=lp.A[:, keep].tocsc(),
            c=lp.c[keep],
            col_lower=lp.col_lower[keep],
            col_upper=lp.col_upper[keep],
            col_names=[lp.col_names[k] for k in keep],
        )
        if solve(changed).status == "optimal":  # reference solve: HiGHS via highspy
            break
    carried, report = remap(base.basis, lp.col_names, lp.row_names, changed)
    assert report["columns_removed"] == 1
    assert carried.basic_count() == changed.m - 1
    repaired, rep = repair_basis(changed, carried)
    assert rep["repaired"] and rep["basic_before"] == changed.m - 1
    assert len(rep["logicals_added"]) >= 1  # a logical fills the hole
    assert_repaired_basis_works(changed, repaired)
    res = reoptimize(changed, carried, SolveOptions(fallback=False))
    assert res.check["basis_repair"]["logicals_added"] == rep["logicals_added"]


@needs_netlib
@pytest.mark.parametrize("name", REPAIR_SET)
def test_repair_of_singular_basis_with_duplicate_column(name):
    """Right count, singular: a copy of a basic column is made basic in place of a basic logical
    (or, with no basic logical, in place of another basic column)."""
    lp = netlib(name)
    base = highs_optimum(name)
    basic_cols = np.flatnonzero(base.basis.col_status == Status.BASIC)
    j = int(basic_cols[0])
    changed = _rebuild(
        lp,
        A=sp.hstack([lp.A, lp.A[:, [j]]]).tocsc(),
        c=np.r_[lp.c, lp.c[j]],
        col_lower=np.r_[lp.col_lower, lp.col_lower[j]],
        col_upper=np.r_[lp.col_upper, lp.col_upper[j]],
        col_names=list(lp.col_names) + [lp.col_names[j] + "_copy"],
    )
    carried, _ = remap(base.basis, lp.col_names, lp.row_names, changed)
    col_status = carried.col_status.copy()
    row_status = carried.row_status.copy()
    col_status[-1] = Status.BASIC
    basic_rows = np.flatnonzero(row_status == Status.BASIC)
    if basic_rows.size:
        i = int(basic_rows[0])
        row_status[i] = Status.AT_LOWER if np.isfinite(changed.row_lower[i]) else Status.AT_UPPER
    else:
        col_status[int(basic_cols[-1])] = Status.AT_LOWER
    broken = Basis(col_status, row_status)
    assert broken.basic_count() == changed.m
    with pytest.raises(SingularBasis):
        Factor(basic_matrix(changed, broken))
    repaired, rep = repair_basis(changed, broken)
    assert rep["repaired"] and rep["basic_before"] == changed.m
    names = set(rep["columns_dropped"])
    assert names & {lp.col_names[j], lp.col_names[j] + "_copy"}  # one of the twins went
    assert not (repaired.col_status[j] == Status.BASIC and repaired.col_status[-1] == Status.BASIC)
    assert_repaired_basis_works(changed, repaired)


def test_repair_leaves_a_good_basis_alone():
    lp = LinearProgram(
        A=sp.csc_matrix([[1.0, 2.0], [3.0, 1.0]]),
        c=[1.0, 1.0],
        col_lower=[0.0, 0.0],
        col_upper=[INF, INF],
        row_lower=[1.0, 1.0],
        row_upper=[INF, INF],
    )
    basis = Basis([Status.BASIC, Status.BASIC], [Status.AT_LOWER, Status.AT_LOWER])
    out, rep = repair_basis(lp, basis)
    assert rep is None
    assert out is basis


def test_repair_with_no_rows_left():
    """Every row removed but a column still basic: the column must become nonbasic."""
    lp = LinearProgram(
        A=sp.csc_matrix((0, 2)),
        c=[1.0, -1.0],
        col_lower=[0.0, 0.0],
        col_upper=[3.0, 4.0],
        row_lower=[],
        row_upper=[],
    )
    repaired, rep = repair_basis(lp, Basis([Status.BASIC, Status.AT_LOWER], []))
    assert repaired.basic_count() == 0
    assert rep["columns_dropped"] == ["x0"]
    res = reoptimize(lp, Basis([Status.BASIC, Status.AT_LOWER], []), SolveOptions(fallback=False))
    assert res.status == "optimal"
    assert res.x == pytest.approx([0.0, 4.0])  # min x0 - x1 over the box, by inspection


# ------------------------------------------------------------------ limits and fallback
@needs_netlib
def test_iteration_limit_without_fallback():
    lp = netlib("afiro")
    res = solve(lp, SolveOptions(engine="builtin", max_iterations=3, fallback=False))
    assert res.status == "iteration_limit"
    assert res.fallback is None
    assert res.x is None and res.objective is None


@needs_netlib
def test_iteration_limit_with_fallback_gives_cold_highs_result():
    # The builtin needs about 45 pivots on sc50a from the slack basis and HiGHS about 18 (measured),
    # so a budget of 30 stops the builtin and leaves HiGHS room.
    lp = netlib("sc50a")
    res = solve(lp, SolveOptions(engine="builtin", max_iterations=30, fallback=False))
    assert res.status == "iteration_limit"
    res = solve(lp, SolveOptions(engine="builtin", max_iterations=30, fallback=True))
    assert res.fallback["reason"] == "iteration_limit"
    assert res.method == "cold_highs" and not res.warm
    assert res.status == "optimal"
    assert res.check["passed"]
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert rel(res.objective, NETLIB["sc50a"].optimum) <= 1e-6


@needs_netlib
def test_fallback_gets_its_own_iteration_budget():
    """The cold HiGHS solve after a fallback has a fresh iteration budget (the
    warm one is what ran out), so the caller still gets an answer."""
    lp = netlib("sc50a")
    res = solve(lp, SolveOptions(engine="builtin", max_iterations=2))
    assert res.fallback["reason"] == "iteration_limit"
    assert res.method == "cold_highs"
    assert res.status == "optimal"
    assert res.check["passed"]
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert rel(res.objective, -64.575077059) <= 1e-6


@needs_netlib
def test_iteration_limit_in_warm_start():
    lp = netlib("adlittle")
    base = highs_optimum("adlittle")
    cut = _rebuild(
        lp,
        A=sp.vstack([lp.A, sp.csr_matrix(np.ones((1, lp.n)))]).tocsc(),
        row_lower=np.r_[lp.row_lower, -INF],
        row_upper=np.r_[lp.row_upper, 0.5 * float(base.x.sum())],
        row_names=list(lp.row_names) + ["cap_cut"],
    )
    carried, _ = remap(base.basis, lp.col_names, lp.row_names, cut)
    res = reoptimize(cut, carried, SolveOptions(max_iterations=1, fallback=False))
    assert res.status == "iteration_limit" and res.warm
    assert res.x is None
    res = reoptimize(cut, carried, SolveOptions(max_iterations=1))
    assert res.fallback["reason"] == "iteration_limit"
    assert res.method == "cold_highs"
    full = reoptimize(cut, carried, SolveOptions(fallback=False))
    ref = solve_highs(cut)  # reference solve: HiGHS via highspy
    assert full.status == ref.status
    if ref.status == "optimal":
        assert rel(full.objective, ref.objective) <= 1e-6


@needs_netlib
def test_time_limit_with_and_without_fallback():
    lp = netlib("sc50a")
    res = solve(lp, SolveOptions(engine="builtin", time_limit=0.0, fallback=False))
    assert res.status == "time_limit"
    assert res.x is None
    res = solve(lp, SolveOptions(engine="builtin", time_limit=0.0))
    assert res.fallback["reason"] == "time_limit"
    assert res.method == "cold_highs"
    # HiGHS gets the same (zero) time budget, so it may stop too; it must say so either way
    assert res.status in ("time_limit", "optimal")
    if res.status == "optimal":
        # source: Netlib published optimum (shared/data/netlib/optimal.csv)
        assert rel(res.objective, NETLIB["sc50a"].optimum) <= 1e-6


def test_already_optimal_basis_ignores_zero_limits():
    """No pivot needed: an optimal start is answered even with no pivot budget at all."""
    lp = LinearProgram(
        A=sp.csc_matrix([[1.0, 1.0]]),
        c=[1.0, 2.0],
        col_lower=[0.0, 0.0],
        col_upper=[INF, INF],
        row_lower=[2.0],
        row_upper=[INF],
    )
    opt = Basis([Status.BASIC, Status.AT_LOWER], [Status.AT_LOWER])
    res = reoptimize(lp, opt, SolveOptions(max_iterations=0, fallback=False))
    assert res.status == "optimal" and res.pivots == 0
    assert res.objective == pytest.approx(2.0)  # x0 = 2 by inspection


# ------------------------------------------------------------------ certificates
def _random_infeasible(seed: int) -> LinearProgram:
    """sum of supplies below sum of demands in a small transport model: infeasible by construction."""
    rng = np.random.default_rng(seed)
    plants, customers = 3, 4
    n = plants * customers
    A = np.zeros((plants + customers, n))
    for p in range(plants):
        A[p, p * customers : (p + 1) * customers] = 1.0
    for k in range(customers):
        A[plants + k, k::customers] = 1.0
    supply = rng.uniform(5, 10, plants)
    demand = rng.uniform(5, 10, customers)
    demand *= 1.2 * supply.sum() / demand.sum()
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=rng.uniform(1, 5, n),
        col_lower=np.zeros(n),
        col_upper=np.full(n, INF),
        row_lower=np.r_[np.full(plants, -INF), demand],
        row_upper=np.r_[supply, np.full(customers, INF)],
    )


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("engine", ["builtin", "highs"])
def test_infeasible_certificate_verifies(seed, engine):
    lp = _random_infeasible(seed)
    res = solve(lp, SolveOptions(engine=engine, fallback=False))
    assert res.status == "infeasible"
    assert res.farkas is not None
    assert verify_farkas(lp, res.farkas)["passed"]
    assert res.check["passed"]


def test_infeasible_warm_after_tightened_supply():
    lp = _random_infeasible(0)
    ok = _rebuild(lp, row_upper=np.r_[lp.row_upper[:3] * 2.0, lp.row_upper[3:]])
    base = solve(ok)  # reference solve: HiGHS via highspy
    assert base.status == "optimal"
    res = reoptimize(lp, base.basis, SolveOptions(fallback=False))
    assert res.status == "infeasible" and res.warm
    assert res.method == "dual"
    assert verify_farkas(lp, res.farkas)["passed"]


@pytest.mark.parametrize("sense", [MINIMIZE, MAXIMIZE])
def test_unbounded_ray_verifies(sense):
    # min -x0 - x1 (or max x0 + x1) with x0 - x1 <= 1, -x0 + x1 <= 4: the ray (1, 1) stays feasible
    lp = LinearProgram(
        A=sp.csc_matrix([[1.0, -1.0], [-1.0, 1.0]]),
        c=np.array([-1.0, -1.0]) * sense,
        col_lower=[0.0, 0.0],
        col_upper=[INF, INF],
        row_lower=[-INF, -INF],
        row_upper=[1.0, 4.0],
        sense=sense,
    )
    res = solve(lp, SolveOptions(engine="builtin", fallback=False))
    assert res.status == "unbounded"
    assert verify_ray(lp, res.ray)["passed"]
    assert res.ray @ lp.c * sense < 0


def test_unbounded_warm_after_capacity_dropped():
    lp = LinearProgram(
        A=sp.csc_matrix([[1.0, 1.0], [1.0, -1.0]]),
        c=[-2.0, -1.0],
        col_lower=[0.0, 0.0],
        col_upper=[INF, INF],
        row_lower=[-INF, -INF],
        row_upper=[10.0, 2.0],
    )
    base = solve(lp)  # reference solve: HiGHS via highspy
    open_lp = _rebuild(lp, row_upper=np.array([INF, 2.0]))
    res = reoptimize(open_lp, base.basis, SolveOptions(fallback=False))
    assert res.status == "unbounded"
    assert verify_ray(open_lp, res.ray)["passed"]


# ------------------------------------------------------------------ dual signs by finite differences
def _production_plan(seed: int, sense: int) -> LinearProgram:
    """A product mix (max profit under plant capacities) or a sourcing plan (min cost meeting demands)."""
    rng = np.random.default_rng(seed)
    m, n = 5, 8
    A = rng.uniform(0.5, 3.0, (m, n)) * (rng.random((m, n)) < 0.7)
    A[np.arange(m), rng.integers(0, n, m)] += 1.0
    A[rng.integers(0, m, n), np.arange(n)] += 1.0
    if sense == MAXIMIZE:
        return LinearProgram(
            A=sp.csc_matrix(A),
            c=rng.uniform(1.0, 4.0, n),
            col_lower=np.zeros(n),
            col_upper=rng.uniform(2.0, 6.0, n),
            row_lower=np.full(m, -INF),
            row_upper=rng.uniform(10.0, 20.0, m),
            sense=MAXIMIZE,
        )
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=rng.uniform(1.0, 4.0, n),
        col_lower=np.zeros(n),
        col_upper=rng.uniform(4.0, 9.0, n),
        row_lower=rng.uniform(5.0, 12.0, m),
        row_upper=np.full(m, INF),
        sense=MINIMIZE,
    )


def _objective(lp: LinearProgram) -> float:
    res = solve(lp, SolveOptions(engine="builtin", fallback=False))
    assert res.status == "optimal"
    return res.objective


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("sense", [MINIMIZE, MAXIMIZE])
def test_shadow_prices_and_reduced_costs_match_finite_differences(seed, sense):
    lp = _production_plan(seed, sense)
    res = solve(lp, SolveOptions(engine="builtin", fallback=False))
    assert res.status == "optimal"
    h = 1e-5
    checked = 0
    for i in range(lp.m):
        st = res.basis.row_status[i]
        if st == Status.BASIC:
            assert res.shadow_price[i] == pytest.approx(0.0, abs=1e-9)
            continue
        side = "row_upper" if st == Status.AT_UPPER else "row_lower"
        moved = getattr(lp, side).copy()
        moved[i] += h
        fd = (_objective(_rebuild(lp, **{side: moved})) - res.objective) / h
        assert res.shadow_price[i] == pytest.approx(fd, rel=1e-4, abs=1e-6)
        checked += 1
    for j in range(lp.n):
        st = res.basis.col_status[j]
        if st == Status.BASIC:
            assert res.reduced_cost[j] == pytest.approx(0.0, abs=1e-9)
            continue
        # d objective / d active bound of the column = its reduced cost
        side = "col_upper" if st == Status.AT_UPPER else "col_lower"
        moved = getattr(lp, side).copy()
        moved[j] += h if st == Status.AT_LOWER else -h
        step = h if st == Status.AT_LOWER else -h
        fd = (_objective(_rebuild(lp, **{side: moved})) - res.objective) / step
        assert res.reduced_cost[j] == pytest.approx(fd, rel=1e-4, abs=1e-6)
        # a cost nudge short of the reduced cost keeps the plan; past it, the column moves
        rc = res.reduced_cost[j]
        if abs(rc) > 1e-3:
            c = lp.c.copy()
            c[j] -= 0.5 * rc
            kept = solve(_rebuild(lp, c=c), SolveOptions(engine="builtin", fallback=False))
            assert kept.x[j] == pytest.approx(res.x[j], abs=1e-9)
            c[j] = lp.c[j] - 1.5 * rc
            moved_plan = solve(_rebuild(lp, c=c), SolveOptions(engine="builtin", fallback=False))
            assert abs(moved_plan.x[j] - res.x[j]) > 1e-6
        checked += 1
    assert checked > 0
    # sign rule of result.py: min has rc >= 0 at lower, max has rc <= 0 at lower
    at_lower = res.basis.col_status == Status.AT_LOWER
    assert (sense * res.reduced_cost[at_lower] >= -1e-9).all()
    binding = res.basis.row_status != Status.BASIC
    if sense == MAXIMIZE:  # capacities (<=): more capacity never hurts a maximization
        assert (res.shadow_price[binding] >= -1e-9).all()
    else:  # demands (>=): more demand never helps a minimization
        assert (res.shadow_price[binding] >= -1e-9).all()


# ------------------------------------------------------------------ edge shapes
EDGE_CASES = {
    # a row with no entries whose bounds exclude 0: infeasible by inspection
    "empty_row_excluding_zero": (
        LinearProgram(
            A=sp.csc_matrix((1, 2)),
            c=[1.0, 1.0],
            col_lower=[0.0, 0.0],
            col_upper=[1.0, 1.0],
            row_lower=[1.0],
            row_upper=[2.0],
        ),
        "infeasible",
    ),
    # a column in no row with a negative cost and no upper bound: unbounded by inspection
    "empty_column_with_negative_cost": (
        LinearProgram(
            A=sp.csc_matrix([[1.0, 0.0]]),
            c=[1.0, -1.0],
            col_lower=[0.0, 0.0],
            col_upper=[1.0, INF],
            row_lower=[0.0],
            row_upper=[1.0],
        ),
        "unbounded",
    ),
    # free columns in an equality with a nonzero cost on one: unbounded along (-1, 1)
    "free_columns_unbounded": (
        LinearProgram(
            A=sp.csc_matrix([[1.0, 1.0]]),
            c=[1.0, 0.0],
            col_lower=[-INF, -INF],
            col_upper=[INF, INF],
            row_lower=[0.0],
            row_upper=[0.0],
        ),
        "unbounded",
    ),
    # infeasible (x0 >= 2 and x0 <= 1) and with an improving ray (x1): infeasible wins
    "infeasible_with_improving_ray": (
        LinearProgram(
            A=sp.csc_matrix([[1.0, 0.0], [1.0, 0.0]]),
            c=[0.0, -1.0],
            col_lower=[0.0, 0.0],
            col_upper=[INF, INF],
            row_lower=[2.0, -INF],
            row_upper=[INF, 1.0],
        ),
        "infeasible",
    ),
    # rows only, no columns; every row admits 0
    "no_columns": (
        LinearProgram(
            A=sp.csc_matrix((2, 0)),
            c=[],
            col_lower=[],
            col_upper=[],
            row_lower=[-1.0, 0.0],
            row_upper=[1.0, 0.0],
        ),
        "optimal",
    ),
    # coefficients, bounds and costs across twelve orders of magnitude
    "wide_range": (
        LinearProgram(
            A=sp.csc_matrix([[1e6, 1.0], [1.0, 1e-6]]),
            c=[-1.0, -1e-6],
            col_lower=[0.0, 0.0],
            col_upper=[1e10, 1e10],
            row_lower=[-INF, -INF],
            row_upper=[1e12, 1e4],
        ),
        "optimal",
    ),
}


@pytest.mark.parametrize("case", sorted(EDGE_CASES))
def test_edge_shapes(case):
    lp, expected = EDGE_CASES[case]
    ref = solve(lp)  # reference solve: HiGHS via highspy
    assert ref.status == expected
    res = solve(lp, SolveOptions(engine="builtin", fallback=False))
    assert res.status == expected
    assert res.check["passed"], res.check
    if expected == "optimal":
        assert rel(res.objective, ref.objective) <= 1e-9
    elif expected == "infeasible":
        assert verify_farkas(lp, res.farkas)["passed"]
    else:
        assert verify_ray(lp, res.ray)["passed"]


def test_highs_path_certifies_an_empty_infeasible_row():
    lp, _ = EDGE_CASES["empty_row_excluding_zero"]
    res = solve(lp)
    assert res.status == "infeasible"
    assert res.farkas is not None and verify_farkas(lp, res.farkas)["passed"]
