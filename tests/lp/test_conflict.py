"""Irreducible infeasible subsets, checked member by member with HiGHS."""

from __future__ import annotations

import zlib

import numpy as np
import pytest
import scipy.sparse as sp

from service.lp import LinearProgram, SolveOptions, solve
from service.lp.conflict import NotInfeasible, _bound_arrays, find_conflict
from service.lp.mps import read_mps
from tests.lp.netlib import netlib_problems

INF = np.inf


def _only(lp: LinearProgram, members) -> LinearProgram:
    """The model keeping just these bound sides (everything else relaxed)."""
    work = lp.copy()
    work.c = np.zeros(lp.n)
    keep = {(m.kind, m.index, m.side) for m in members}
    for kind, lo, up in (
        ("variable", work.col_lower, work.col_upper),
        ("constraint", work.row_lower, work.row_upper),
    ):
        for k in range(lo.size):
            if (kind, k, "lower") not in keep:
                lo[k] = -INF
            if (kind, k, "upper") not in keep:
                up[k] = INF
    return work


def assert_irreducible(lp: LinearProgram, conflict) -> None:
    assert conflict.members, "an infeasible model has a non-empty conflict"
    core = _only(lp, conflict.members)
    assert solve(core).status == "infeasible"  # reference: HiGHS, the set alone is infeasible
    for m in conflict.members:  # dropping any one member makes the rest feasible (HiGHS)
        relaxed = core.copy()
        arr = _bound_arrays(relaxed, m.kind, m.side)
        arr[m.index] = -INF if m.side == "lower" else INF
        assert solve(relaxed).status == "optimal", f"{m.kind} {m.name} ({m.side}) is not needed"


def planner_model() -> LinearProgram:
    """Two plants, one customer: a contract minimum above what a plant can make."""
    # columns: make_A, make_B, ship_A, ship_B ; rows: capA, capB, flowA, flowB, contract_B, demand
    A = np.array(
        [
            [1, 0, 0, 0],  # capacity A: make_A <= 100
            [0, 1, 0, 0],  # capacity B: make_B <= 40
            [1, 0, -1, 0],  # flow A: make_A - ship_A = 0
            [0, 1, 0, -1],  # flow B
            [0, 0, 0, 1],  # contract minimum from B: ship_B >= 60
            [0, 0, 1, 1],  # demand: ship_A + ship_B >= 90
        ],
        dtype=float,
    )
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=[2.0, 3.0, 1.0, 1.0],
        col_lower=[0.0] * 4,
        col_upper=[INF] * 4,
        row_lower=[-INF, -INF, 0.0, 0.0, 60.0, 90.0],
        row_upper=[100.0, 40.0, 0.0, 0.0, INF, INF],
        col_names=["make[A]", "make[B]", "ship[A]", "ship[B]"],
        row_names=["cap[A]", "cap[B]", "flow[A]", "flow[B]", "contract_min[B]", "demand[C1]"],
    )


def test_contract_minimum_above_plant_capacity():
    lp = planner_model()
    conflict = find_conflict(lp)
    names = {(m.name, m.side) for m in conflict.members}
    # the contract minimum, plant B's capacity and the flow balance linking them
    assert ("contract_min[B]", "lower") in names
    assert ("cap[B]", "upper") in names
    assert ("demand[C1]", "lower") not in names  # demand is not part of this conflict
    assert_irreducible(lp, conflict)


def test_demand_above_total_supply():
    lp = planner_model()
    lp.row_lower[4] = 0.0  # no contract minimum
    lp.row_lower[5] = 200.0  # demand above both plants together (140)
    conflict = find_conflict(lp)
    names = {(m.name, m.side) for m in conflict.members}
    assert {("demand[C1]", "lower"), ("cap[A]", "upper"), ("cap[B]", "upper")} <= names
    assert_irreducible(lp, conflict)


def test_feasible_model_has_no_conflict():
    lp = planner_model()
    lp.row_lower[4] = 0.0  # no contract minimum: 90 units of demand fit in 140 of capacity
    with pytest.raises(NotInfeasible):
        find_conflict(lp)


NETLIB = [
    p
    for p in netlib_problems()
    if p.name in {"afiro", "sc50a", "adlittle", "blend", "kb2", "share2b", "recipe", "stocfor1"}
]


@pytest.mark.parametrize("problem", NETLIB, ids=[p.name for p in NETLIB])
def test_infeasible_netlib_variants(problem):
    """Netlib problem + a row demanding more of the optimum's activities than allowed."""
    lp = read_mps(problem.path)
    base = solve(lp)
    rng = np.random.default_rng(zlib.crc32(problem.name.encode()))
    x = base.x
    nz = np.flatnonzero(np.abs(x) > 1e-9)
    pick = rng.choice(nz, size=min(nz.size, 4), replace=False)
    a = np.zeros(lp.n)
    a[pick] = np.sign(x[pick])
    # maximal attainable a @ x over the feasible set, then ask for more
    probe = lp.copy()
    probe.c = -a if lp.sense == 1 else a
    best = solve(probe)
    assert best.status == "optimal"
    target = float(a @ best.x) + 1.0 + 0.1 * abs(float(a @ best.x))
    changed = LinearProgram(
        A=sp.vstack([lp.A, sp.csr_matrix(a)]).tocsc(),
        c=lp.c,
        col_lower=lp.col_lower,
        col_upper=lp.col_upper,
        row_lower=np.r_[lp.row_lower, target],
        row_upper=np.r_[lp.row_upper, INF],
        sense=lp.sense,
        col_names=lp.col_names,
        row_names=list(lp.row_names) + ["stretch_goal"],
    )
    assert solve(changed).status == "infeasible"  # reference: HiGHS
    conflict = find_conflict(changed, options=SolveOptions())
    assert any(m.name == "stretch_goal" for m in conflict.members)
    assert_irreducible(changed, conflict)
    assert conflict.solves <= conflict.started_from + 3
