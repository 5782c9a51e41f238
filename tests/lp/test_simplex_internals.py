"""Builtin simplex internals (service/lp/simplex.py): pricing options, limits, pivot log, degeneracy,
and the consistency of the incrementally updated state with a recomputation from scratch.

Outside checks:
- Netlib published optima (shared/data/netlib/optimal.csv);
- reference solves of changed or generated models: HiGHS via highspy (service.lp.solve, engine "highs");
- textbook cycling examples, named with book and edition beside each (values from memory, and
  cross-checked against the HiGHS reference solve).
"""

from __future__ import annotations

import itertools
import zlib
from functools import lru_cache

import numpy as np
import pytest
import scipy.sparse as sp
from conftest import PIVOT_FIELDS
from hypothesis import given, settings
from hypothesis import strategies as st

from service.lp import MAXIMIZE, LinearProgram, SolveOptions, remap, reoptimize, slack_basis, solve
from service.lp.basis import Status
from service.lp.check import verify
from service.lp.mps import read_mps
from service.lp.simplex import Simplex
from tests.lp.changes import one_cut, three_cuts
from tests.lp.netlib import netlib_problems

INF = np.inf
NETLIB = {p.name: p for p in netlib_problems()}
needs_netlib = pytest.mark.skipif(not NETLIB, reason="shared Netlib data not found")
SMALL = ["afiro", "sc50a", "adlittle", "blend", "kb2", "share2b"]
DUAL_RULES = ["steepest_edge", "dantzig", "smallest_index"]
PRIMAL_RULES = ["devex", "dantzig"]
RULES = list(itertools.product(DUAL_RULES, PRIMAL_RULES))


@lru_cache(maxsize=None)
def netlib(name: str) -> LinearProgram:
    return read_mps(NETLIB[name].path)


@lru_cache(maxsize=None)
def highs(name: str):
    """Reference solve: HiGHS via highspy (cold)."""
    return solve(netlib(name))


def rel(a: float, b: float) -> float:
    return abs(a - b) / max(1.0, abs(b))


def builtin(**kw) -> SolveOptions:
    return SolveOptions(engine="builtin", fallback=False, **kw)


def pivot_records(res) -> list[dict]:
    return [r for r in res.pivot_log if "event" not in r]


# ------------------------------------------------------------------ pricing rules
@needs_netlib
@pytest.mark.parametrize("dual_rule,primal_rule", RULES)
@pytest.mark.parametrize("name", SMALL)
def test_pricing_rules_reach_published_optimum(name, dual_rule, primal_rule):
    res = solve(netlib(name), builtin(dual_pricing=dual_rule, primal_pricing=primal_rule))
    assert res.status == "optimal", res.message
    assert res.check["passed"]
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert rel(res.objective, NETLIB[name].optimum) <= 1e-6


@needs_netlib
@pytest.mark.parametrize("dual_rule,primal_rule", RULES)
@pytest.mark.parametrize("change", [one_cut, three_cuts], ids=["one_cut", "three_cuts"])
@pytest.mark.parametrize("name", SMALL)
def test_pricing_rules_on_warm_cuts(name, change, dual_rule, primal_rule):
    lp = netlib(name)
    base = highs(name)
    rng = np.random.default_rng(zlib.crc32(f"{name}/{change.__name__}".encode()))
    changed = change(lp, base, rng)
    carried, _ = remap(base.basis, lp.col_names, lp.row_names, changed)
    res = reoptimize(changed, carried, builtin(dual_pricing=dual_rule, primal_pricing=primal_rule))
    ref = solve(changed)  # reference solve: HiGHS via highspy
    assert res.status == ref.status, res.message
    assert res.check["passed"]
    assert res.warm and res.fallback is None
    if ref.status == "optimal":
        assert rel(res.objective, ref.objective) <= 1e-6
        assert "dual" in res.method


@needs_netlib
@pytest.mark.parametrize("fallback", [False, True])
@pytest.mark.parametrize("dual_rule", ["steepest_edge", "dantzig"])
def test_degen2_dantzig_primal_does_not_crash(dual_rule, fallback):
    # refactor_every=16 pins the refactorization interval (the adaptive interval depends on
    # measured factorization time, which makes the pivot sequence vary between runs)
    res = solve(
        netlib("degen2"),
        SolveOptions(
            engine="builtin",
            dual_pricing=dual_rule,
            primal_pricing="dantzig",
            refactor_every=16,
            fallback=fallback,
        ),
    )
    assert res.status == "optimal"
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert rel(res.objective, NETLIB["degen2"].optimum) <= 1e-6


@needs_netlib
@pytest.mark.parametrize("name", ["afiro", "sc50a", "blend"])
def test_unscaled_solve(name):
    res = solve(netlib(name), builtin(scale=False))
    assert res.status == "optimal" and res.check["passed"]
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert rel(res.objective, NETLIB[name].optimum) <= 1e-6


@needs_netlib
@pytest.mark.parametrize("every", [1, 2, 7])
def test_frequent_refactorization_changes_nothing(every):
    """Refactorizing after every few updates must give the same optimum (and log the events)."""
    res = solve(netlib("sc50a"), builtin(refactor_every=every))
    assert res.status == "optimal"
    # source: Netlib published optimum (shared/data/netlib/optimal.csv)
    assert rel(res.objective, NETLIB["sc50a"].optimum) <= 1e-6
    refactors = [r for r in res.pivot_log if r.get("event") == "refactor" and r["reason"] == "update_limit"]
    assert len(refactors) >= res.pivots // every - 2


# ------------------------------------------------------------------ pivot log
@needs_netlib
@pytest.mark.parametrize("name", ["afiro", "adlittle"])
def test_pivot_log_records(name):
    res = solve(netlib(name), builtin(log_limit=100_000))
    assert res.status == "optimal"
    pivots = pivot_records(res)
    assert len(pivots) == res.pivots and res.log_dropped == 0
    for rec in pivots:
        assert PIVOT_FIELDS <= rec.keys()
        assert rec["algorithm"] in ("dual", "primal")
        assert rec["entering"] in netlib(name).col_names + netlib(name).row_names
        assert rec["bound_flips"] >= 0
        assert rec["primal_infeasibility"] >= 0 and rec["dual_infeasibility"] >= 0
        if rec["leaving"] is not None:
            assert rec["pivot"] is not None and rec["pivot"] != 0.0
            assert rec["leaving_bound"] in ("lower", "upper")
    assert [r["iteration"] for r in pivots] == list(range(1, res.pivots + 1))
    events = [r for r in res.pivot_log if "event" in r]
    for ev in events:
        assert ev["reason"]
    # the log ends where the solve ends (no perturbation removal moved the point here)
    if not any(ev["event"] == "perturb" for ev in events):
        assert pivots[-1]["objective"] == pytest.approx(res.objective, rel=1e-9, abs=1e-9)
        assert pivots[-1]["primal_infeasibility"] <= 1e-6
    # the dual simplex never makes the (min-sense) objective worse
    sense = netlib(name).sense
    dual_obj = [sense * r["objective"] for r in pivots if r["algorithm"] == "dual"]
    assert all(b >= a - 1e-7 * (1 + abs(a)) for a, b in zip(dual_obj, dual_obj[1:]))


@needs_netlib
@pytest.mark.parametrize("limit", [0, 1, 10])
def test_log_limit_caps_and_counts(limit):
    res = solve(netlib("adlittle"), builtin(log_limit=limit))
    assert res.status == "optimal"
    pivots = pivot_records(res)
    assert len(pivots) == min(limit, res.pivots)
    assert len(pivots) + res.log_dropped == res.pivots
    assert pivots == sorted(pivots, key=lambda r: r["iteration"])


@needs_netlib
def test_warm_log_after_cut_is_dual_and_reaches_final_objective():
    lp = netlib("sc50a")
    base = highs("sc50a")
    changed = one_cut(lp, base, np.random.default_rng(7))
    carried, _ = remap(base.basis, lp.col_names, lp.row_names, changed)
    res = reoptimize(changed, carried, builtin())
    assert res.status == "optimal"
    pivots = pivot_records(res)
    assert pivots and pivots[0]["algorithm"] == "dual"
    assert pivots[0]["leaving"] == "cut0" or any(r["leaving"] == "cut0" for r in pivots)
    assert pivots[-1]["objective"] == pytest.approx(res.objective, rel=1e-9)
    assert pivots[-1]["primal_infeasibility"] <= 1e-6


# ------------------------------------------------------------------ cycling-prone examples
def beale() -> LinearProgram:
    """E. M. L. Beale's 1955 cycling example as reproduced in V. Chvatal, "Linear Programming"
    (W. H. Freeman, 1983), and in Bazaraa, Jarvis and Sherali, "Linear Programming and Network
    Flows" (4th ed., 2010): min -3/4 x4 + 20 x5 - 1/2 x6 + 6 x7 subject to
    1/4 x4 - 8 x5 - x6 + 9 x7 <= 0, 1/2 x4 - 12 x5 - 1/2 x6 + 3 x7 <= 0, x6 <= 1, x >= 0.
    Optimum -5/4 at x4 = 1, x6 = 1 (from memory; checked by hand: both rows hold, and the
    HiGHS reference solve agrees in the test). Dantzig's rule with smallest-index ties cycles
    at the origin in exact arithmetic."""
    A = [[0.25, -8.0, -1.0, 9.0], [0.5, -12.0, -0.5, 3.0], [0.0, 0.0, 1.0, 0.0]]
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=[-0.75, 20.0, -0.5, 6.0],
        col_lower=np.zeros(4),
        col_upper=np.full(4, INF),
        row_lower=np.full(3, -INF),
        row_upper=[0.0, 0.0, 1.0],
        col_names=["x4", "x5", "x6", "x7"],
    )


def chvatal() -> LinearProgram:
    """V. Chvatal, "Linear Programming" (W. H. Freeman, 1983), Chapter 3 cycling example:
    max 10 x1 - 57 x2 - 9 x3 - 24 x4 subject to 0.5 x1 - 5.5 x2 - 2.5 x3 + 9 x4 <= 0,
    0.5 x1 - 1.5 x2 - 0.5 x3 + x4 <= 0, x1 <= 1, x >= 0. Optimum 1 at x1 = x3 = 1
    (from memory; the HiGHS reference solve agrees in the test)."""
    A = [[0.5, -5.5, -2.5, 9.0], [0.5, -1.5, -0.5, 1.0], [1.0, 0.0, 0.0, 0.0]]
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=[10.0, -57.0, -9.0, -24.0],
        col_lower=np.zeros(4),
        col_upper=np.full(4, INF),
        row_lower=np.full(3, -INF),
        row_upper=[0.0, 0.0, 1.0],
        sense=MAXIMIZE,
    )


def beale_dual() -> LinearProgram:
    """The LP dual of Beale's example, min w3 s.t. A' w >= -c, w >= 0: its slack basis is dual
    feasible and primal infeasible, so the dual simplex walks the same degenerate vertex.
    Optimum 5/4 by LP duality with the primal's -5/4."""
    lp = beale()
    return LinearProgram(
        A=lp.A.T.tocsc(),
        c=[0.0, 0.0, 1.0],
        col_lower=np.zeros(3),
        col_upper=np.full(3, INF),
        row_lower=-lp.c,
        row_upper=np.full(4, INF),
    )


CYCLING = {"beale": (beale, -1.25), "chvatal": (chvatal, 1.0), "beale_dual": (beale_dual, 1.25)}


@pytest.mark.parametrize("scale", [True, False])
@pytest.mark.parametrize("dual_rule,primal_rule", RULES)
@pytest.mark.parametrize("example", sorted(CYCLING))
def test_cycling_examples_cold_and_warm(example, dual_rule, primal_rule, scale):
    make, optimum = CYCLING[example]
    lp = make()
    assert solve(lp).objective == pytest.approx(optimum, abs=1e-9)  # reference solve: HiGHS via highspy
    opts = builtin(dual_pricing=dual_rule, primal_pricing=primal_rule, scale=scale, max_iterations=200)
    cold = solve(lp, opts)
    assert cold.status == "optimal" and cold.check["passed"]
    assert cold.objective == pytest.approx(optimum, abs=1e-9)  # textbook value, from memory
    # warm path: start at the degenerate slack vertex, which is where the cycling happens
    warm = reoptimize(lp, slack_basis(lp), opts)
    assert warm.status == "optimal" and warm.warm and warm.fallback is None
    assert warm.objective == pytest.approx(optimum, abs=1e-9)
    # warm path: from the optimum of the model with its finite row bounds halved
    halved = LinearProgram(
        **{**lp.__dict__, "row_lower": 0.5 * lp.row_lower, "row_upper": 0.5 * lp.row_upper}
    )
    start = solve(halved)  # reference solve: HiGHS via highspy
    assert start.status == "optimal"
    again = reoptimize(lp, start.basis, opts)
    assert again.status == "optimal" and again.fallback is None
    assert again.objective == pytest.approx(optimum, abs=1e-9)


def degenerate_lp(seed: int, m: int = 40, n: int = 60) -> LinearProgram:
    """Many rows A x <= 0 (and = 0) through the origin: every vertex near it is highly degenerate."""
    rng = np.random.default_rng(seed)
    A = rng.integers(-3, 4, (m, n)) * (rng.random((m, n)) < 0.25)
    A[np.arange(m), rng.integers(0, n, m)] = 1
    rhs = np.where(rng.random(m) < 0.85, 0.0, rng.integers(1, 5, m).astype(float))
    lower = np.where(rng.random(m) < 0.25, rhs, -INF)
    upper = np.where(rng.random(n) < 0.6, rng.integers(1, 4, n).astype(float), INF)
    return LinearProgram(
        A=sp.csc_matrix(A.astype(float)),
        c=rng.integers(-5, 6, n).astype(float),
        col_lower=np.zeros(n),
        col_upper=upper,
        row_lower=lower,
        row_upper=rhs,
    )


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    rules=st.sampled_from(RULES),
    scale=st.booleans(),
    stall=st.sampled_from([50, 500]),
)
def test_degenerate_generated_lps(seed, rules, scale, stall):
    lp = degenerate_lp(seed)
    ref = solve(lp)  # reference solve: HiGHS via highspy
    opts = builtin(dual_pricing=rules[0], primal_pricing=rules[1], scale=scale, stall_limit=stall)
    res = solve(lp, opts)
    assert res.status == ref.status
    assert res.check["passed"]
    if ref.status == "optimal":
        assert rel(res.objective, ref.objective) <= 1e-6
        assert verify(lp, res.x, res.row_activity, res.shadow_price, res.reduced_cost, res.basis)["passed"]


@pytest.mark.parametrize("primal_rule", PRIMAL_RULES)
def test_early_primal_perturbation_does_not_crash(primal_rule):
    lp = degenerate_lp(0)
    res = solve(lp, builtin(primal_pricing=primal_rule, stall_limit=5, refactor_every=16))
    assert res.status == solve(lp).status  # reference solve: HiGHS via highspy


# ------------------------------------------------------------------ state consistency
def _fresh_state(sim: Simplex) -> tuple[np.ndarray, np.ndarray]:
    """x and d recomputed from scratch for the simplex's current basis (a new factorization)."""
    x_inc, d_inc = sim.x.copy(), sim.d.copy()
    sim.refactor("test_recompute")
    x_new, d_new = sim.x.copy(), sim.d.copy()
    sim.x, sim.d = x_inc, d_inc
    return x_new, d_new


@needs_netlib
@pytest.mark.parametrize("dual_rule,primal_rule", RULES)
@pytest.mark.parametrize("name", ["sc50a", "kb2", "blend"])
def test_incremental_state_matches_recomputation(name, dual_rule, primal_rule):
    """Stop the simplex every few pivots and compare its updated x and d with a recomputation."""
    lp = netlib(name)
    opts = builtin(dual_pricing=dual_rule, primal_pricing=primal_rule, refactor_every=1000)
    worst_x = worst_d = 0.0
    compared = 0
    for budget in (5, 13, 29, 57):
        sim = Simplex(lp, slack_basis(lp), SolveOptions(**{**opts.__dict__, "max_iterations": budget}))
        out = sim.run()
        if out.status != "iteration_limit":
            break
        x_new, d_new = _fresh_state(sim)
        scale_x = 1.0 + np.abs(x_new).max()
        scale_d = 1.0 + np.abs(sim.cost).max()
        worst_x = max(worst_x, float(np.abs(sim.x - x_new).max() / scale_x))
        worst_d = max(worst_d, float(np.abs(sim.d - d_new).max() / scale_d))
        compared += 1
    assert compared >= 2
    assert worst_x <= 1e-9
    assert worst_d <= 1e-9


def covering_lp(seed: int, m: int = 30, n: int = 45) -> LinearProgram:
    """Meet every customer's demand at least cost: min c x, A x >= demand, 0 <= x <= cap.
    Positive costs make the slack basis dual feasible, positive demands make it primal
    infeasible, so a cold start runs the dual simplex only."""
    rng = np.random.default_rng(seed)
    A = rng.uniform(0.5, 2.0, (m, n)) * (rng.random((m, n)) < 0.2)
    A[np.arange(m), rng.integers(0, n, m)] = 1.0
    A[rng.integers(0, m, n), np.arange(n)] += 0.5
    return LinearProgram(
        A=sp.csc_matrix(A),
        c=rng.uniform(1.0, 5.0, n),
        col_lower=np.zeros(n),
        col_upper=np.where(rng.random(n) < 0.5, rng.uniform(2.0, 6.0, n), INF),
        row_lower=rng.uniform(1.0, 4.0, m),
        row_upper=np.full(m, INF),
    )


@pytest.mark.parametrize("seed", range(4))
def test_dual_steepest_edge_weights_are_exact_from_the_slack_basis(seed):
    """From the slack basis (B = -I, weights exactly 1) the Forrest-Goldfarb update keeps
    w_i = ||e_i' B^-1||^2 exactly while only dual pivots happen."""
    lp = covering_lp(seed)
    ref = solve(lp)  # reference solve: HiGHS via highspy
    checked = 0
    for budget in (3, 10, 20, 40):
        sim = Simplex(lp, slack_basis(lp), builtin(max_iterations=budget))
        out = sim.run()
        assert sim.algorithms == ["dual"]
        if out.status != "iteration_limit":
            assert out.status == ref.status
            break
        basic = sim.basic_idx
        B = sim._basis_matrix(basic).toarray()
        exact = (np.linalg.inv(B) ** 2).sum(axis=1)
        assert sim.dse == pytest.approx(exact, rel=1e-7)
        checked += 1
    assert checked >= 2


# ------------------------------------------------------------------ targeted attempts to break it
def test_tiny_coefficient_does_not_give_a_false_infeasible():
    # 1e-8 x >= 1, x >= 0 is feasible (x = 1e8); without scaling the pivot row entry is below 1e-7.
    lp = LinearProgram(
        A=sp.csc_matrix([[1e-8]]),
        c=[0.0],
        col_lower=[0.0],
        col_upper=[INF],
        row_lower=[1.0],
        row_upper=[INF],
    )
    assert solve(lp).status == "optimal"  # reference solve: HiGHS via highspy
    # The builtin engine cannot pivot on 1e-8 (below pivot_tol), but it must not
    # call the model infeasible: it reports the verdict as unproven ...
    alone = solve(lp, builtin(scale=False))
    assert alone.status != "infeasible"
    # ... and with the fallback the caller gets HiGHS's optimum and the reason.
    res = solve(lp, SolveOptions(engine="builtin", scale=False))
    assert res.status == "optimal"
    assert res.fallback["reason"] == "unproven_infeasibility"


def test_free_columns_and_free_rows():
    """Free structurals (nonbasic free at zero in the slack basis) and a free row (objective-like)."""
    rng = np.random.default_rng(11)
    m, n = 12, 18
    A = rng.standard_normal((m, n)) * (rng.random((m, n)) < 0.5)
    A[np.arange(m), np.arange(m)] += 3.0
    x0 = rng.uniform(-2, 2, n)
    act = A @ x0
    lower = np.where(rng.random(m) < 0.5, act - 1.0, -INF)
    upper = act + rng.uniform(0.5, 2.0, m)
    lower[0], upper[0] = -INF, INF  # a free row
    col_lower = np.where(rng.random(n) < 0.5, -INF, x0 - 3.0)
    col_upper = np.where(rng.random(n) < 0.5, INF, x0 + 3.0)
    col_lower[:4], col_upper[:4] = -INF, INF
    lp = LinearProgram(
        A=sp.csc_matrix(A),
        c=rng.standard_normal(n),
        col_lower=col_lower,
        col_upper=col_upper,
        row_lower=lower,
        row_upper=upper,
    )
    ref = solve(lp)  # reference solve: HiGHS via highspy
    for rules in RULES:
        res = solve(lp, builtin(dual_pricing=rules[0], primal_pricing=rules[1]))
        assert res.status == ref.status
        assert res.check["passed"]
        if ref.status == "optimal":
            assert rel(res.objective, ref.objective) <= 1e-6
            assert not (res.basis.col_status == Status.AT_LOWER)[:4].any()


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), rules=st.sampled_from(RULES))
def test_warm_start_from_random_basis_neither_feasible(seed, rules):
    """Any square nonsingular starting basis, usually neither primal nor dual feasible."""
    rng = np.random.default_rng(seed)
    m, n = 10, 16
    A = rng.uniform(-2, 3, (m, n)) * (rng.random((m, n)) < 0.6)
    A[np.arange(m), rng.integers(0, n, m)] += 2.0
    lp = LinearProgram(
        A=sp.csc_matrix(A),
        c=rng.uniform(-3, 3, n),
        col_lower=np.zeros(n),
        col_upper=np.where(rng.random(n) < 0.5, rng.uniform(1, 5, n), INF),
        row_lower=np.where(rng.random(m) < 0.3, rng.uniform(-2, 1, m), -INF),
        row_upper=rng.uniform(1, 8, m),
        sense=int(rng.choice([1, -1])),
    )
    status = slack_basis(lp)
    k = int(rng.integers(1, m + 1))
    cols = rng.choice(n, size=k, replace=False)
    rows = rng.choice(m, size=k, replace=False)
    status.col_status[cols] = Status.BASIC
    status.row_status[rows] = Status.AT_UPPER
    ref = solve(lp)  # reference solve: HiGHS via highspy
    res = reoptimize(lp, status, builtin(dual_pricing=rules[0], primal_pricing=rules[1]))
    assert res.status == ref.status, res.message
    assert res.check["passed"]
    if ref.status == "optimal":
        assert rel(res.objective, ref.objective) <= 1e-6
