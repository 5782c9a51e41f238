"""Records the engine hands back: options in, result out.

Sign conventions (in the user's objective sense, maximization included):
- shadow_price[i] = d(objective) / d(active bound of row i)
- reduced_cost[j] = c[j] - A[:, j] @ shadow_price
so a minimization at optimum has reduced_cost >= 0 for columns at lower, and a
maximization has reduced_cost <= 0 there.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .basis import Basis

OPTIMAL = "optimal"
INFEASIBLE = "infeasible"
UNBOUNDED = "unbounded"
ITERATION_LIMIT = "iteration_limit"
TIME_LIMIT = "time_limit"
ERROR = "error"
STATUSES = (OPTIMAL, INFEASIBLE, UNBOUNDED, ITERATION_LIMIT, TIME_LIMIT, ERROR)


@dataclass
class SolveOptions:
    engine: str = "highs"  # cold solves: "highs" or "builtin"
    max_iterations: int = 200_000
    time_limit: float = 600.0  # seconds
    primal_tol: float = 1e-7  # feasibility tolerance in the scaled model
    dual_tol: float = 1e-7  # optimality tolerance in the scaled model
    pivot_tol: float = 1e-7  # smallest pivot element accepted
    refactor_every: int = 100  # eta updates between refactorizations
    log_limit: int = 1000  # pivot log records kept per solve
    scale: bool = True
    dual_pricing: str = "steepest_edge"  # or "dantzig" or "smallest_index"
    primal_pricing: str = "devex"  # or "dantzig"
    stall_limit: int = 500  # pivots without objective progress before perturbing
    fallback: bool = True  # cold HiGHS solve on numerical trouble
    ranging: bool = False  # compute cost and RHS ranges at an optimum
    check_tol: float = 1e-6  # relative tolerance of the independent check


@dataclass
class Ranging:
    """Classical sensitivity ranges at an optimal basis (user's sense).

    cost_lower/cost_upper: interval of c[j] over which the basis stays optimal.
    rhs_lower/rhs_upper: interval of the row's active bound (or of its
    activity for a basic row) over which the shadow price stays valid.
    Unbounded sides are +-inf.
    """

    cost_lower: np.ndarray
    cost_upper: np.ndarray
    rhs_lower: np.ndarray
    rhs_upper: np.ndarray


@dataclass
class SolveResult:
    status: str
    objective: float | None
    x: np.ndarray | None
    row_activity: np.ndarray | None
    shadow_price: np.ndarray | None
    reduced_cost: np.ndarray | None
    basis: Basis | None
    method: str  # "cold_highs", "cold_builtin", "dual", "primal", "dual+primal", "none"
    warm: bool
    pivots: int = 0
    reason: str = ""  # why this method ran
    fallback: dict | None = None  # {"reason": ..., "detail": ...} when a cold solve replaced a warm one
    pivot_log: list[dict[str, Any]] = field(default_factory=list)
    log_dropped: int = 0
    timings: dict[str, float] = field(default_factory=dict)  # seconds
    check: dict[str, Any] = field(default_factory=dict)
    farkas: np.ndarray | None = None  # row multipliers proving infeasibility
    ray: np.ndarray | None = None  # column direction proving unboundedness
    ranging: Ranging | None = None
    message: str = ""
    state: Any = None  # engine's warm state for the next re-optimization (in-process only)

    @classmethod
    def without_solution(
        cls, status: str, *, method: str, warm: bool, reason: str, message: str = ""
    ) -> "SolveResult":
        """A result that carries no plan (an error, a limit, or before one is attached)."""
        return cls(
            status=status,
            objective=None,
            x=None,
            row_activity=None,
            shadow_price=None,
            reduced_cost=None,
            basis=None,
            method=method,
            warm=warm,
            reason=reason,
            message=message,
        )
