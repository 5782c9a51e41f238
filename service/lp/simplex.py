"""Bounded revised simplex: dual and primal, warm-startable from any basis.

Computational form (after scaling, see scaling.py), with N = n + m:

    minimize   cost @ x          (cost = sense * c, zeros for logicals)
    subject to Af @ x = 0,       Af = [A, -I]   (logical x[n+i] = row activity i)
               lower <= x <= upper

Notation (textbook meaning, used throughout this module):
    B, basic_idx   basis matrix and the variable basic in each row
    x_B            values of the basic variables, x_B = -B^-1 (Af_N x_N)
    y              simplex multipliers, B^T y = cost_B
    d              reduced costs, d = cost - Af^T y (zero for basics)
    rho_r          row r of B^-1, from BTRAN of e_r
    alpha_r        pivot row, alpha_r = Af^T rho_r
    alpha_q        pivot column, alpha_q = B^-1 a_q (FTRAN)

Dual simplex iteration (one function per step, as the loop in ``_dual``):
choose a leaving row among primal-infeasible basics (dual steepest edge by
default, Forrest and Goldfarb 1992), compute the pivot row, choose the entering
column by a ratio test that keeps every reduced cost dual feasible: among the
columns whose pivot-row entry can restore the row, the smallest |d_j /
alpha_rj|, done as a Harris (1973) two-pass test with bound flipping for
boxed columns (the long-step or bound-flipping ratio test, Fourer 1994;
Maros 2003). No candidate proves primal infeasibility (rho_r is a Farkas
certificate).

Primal simplex: devex pricing (Harris 1973), Harris two-pass ratio test with
the entering column's own bound flip; no blocking row gives an unbounded ray.

A start that is neither primal nor dual feasible is handled by shifting costs
until the basis is dual feasible, running the dual simplex, removing the
shifts and finishing with the primal simplex. Stalling triggers cost (dual)
or bound (primal) perturbation; perturbations are removed before returning
and the result is cleaned up by the other algorithm when needed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from . import kernels
from .basis import Basis, Status
from .factor import BorderedFactor, Factor, SingularBasis
from .model import LinearProgram, rows_appended
from .result import SolveOptions
from .scaling import Scaling, compute_scaling, scale_matrix

BASIC = int(Status.BASIC)
AT_LOWER = int(Status.AT_LOWER)
AT_UPPER = int(Status.AT_UPPER)
FIXED = int(Status.FIXED)
FREE = int(Status.FREE)
# d must be >= 0 at lower and <= 0 at upper: infeasibility is max(-sign * d, 0)
_DUAL_SIGN = np.array([0.0, 1.0, -1.0, 0.0, 0.0])
_ROW_RULES = {
    "steepest_edge": kernels.RULE_STEEPEST_EDGE,
    "dantzig": kernels.RULE_DANTZIG,
    "smallest_index": kernels.RULE_SMALLEST_INDEX,
}
_NO_SHIFT = np.zeros(0)


class NumericalTrouble(RuntimeError):
    """The simplex could not continue reliably; the caller should fall back."""

    def __init__(self, reason: str, detail: str = "") -> None:
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail


class LimitReached(RuntimeError):
    def __init__(self, status: str) -> None:
        super().__init__(status)
        self.status = status


@dataclass
class EngineState:
    """What a finished solve leaves behind for the next re-optimization of the
    same model: scaling, scaled matrix and the final factorization. Opaque to
    callers; never modified once made (a later solve wraps it, see
    factor.BorderedFactor)."""

    A: sp.csc_matrix  # the unscaled matrix this state belongs to
    scaling: Scaling
    A_scaled: sp.csc_matrix
    basic_idx: np.ndarray
    factor: object


MAX_REUSE_DEPTH = 6  # bordered layers on one factorization before a fresh one


def _refactor_interval(factor, options: SolveOptions) -> int:
    """Updates between refactorizations, balancing the factorization's cost
    against the growing eta file: about sqrt(2 * t_factor / t_eta). Both are
    modelled from the LU's size so the pivot sequence is reproducible:
    t_factor ~ 250 ns per nonzero of L + U (factorizing and recomputing the
    primal and dual values) and t_eta ~ 4 us per eta and pivot with the
    compiled eta loops (kernels.py), giving sqrt(nnz(L + U) / 8); a sweep of
    the divisor (200, 50, 20, 8) on the 10,000- and 2,000-row outage
    benchmarks was fastest at 8. At least 16 and never above the option."""
    nnz = getattr(factor, "lu_nnz", 0)
    return int(min(options.refactor_every, max(16, np.sqrt(nnz / 8.0))))


@dataclass
class SimplexOutcome:
    status: str  # optimal / infeasible / unbounded / iteration_limit / time_limit
    x: np.ndarray  # structural values, unscaled
    y: np.ndarray  # duals (min sense, unscaled)
    basis: Basis
    pivots: int
    algorithms: list[str]
    pivot_log: list[dict]
    log_dropped: int
    farkas: np.ndarray | None = None
    ray: np.ndarray | None = None
    events: list[dict] = field(default_factory=list)
    timings: dict = field(default_factory=dict)
    state: EngineState | None = None


class Simplex:
    """One solve of one model from one starting basis."""

    def __init__(
        self, lp: LinearProgram, basis: Basis, options: SolveOptions, state: EngineState | None = None
    ) -> None:
        self.t0 = time.perf_counter()
        self.lp = lp
        self.opt = options
        m, n = lp.m, lp.n
        self.m, self.n, self.N = m, n, n + m
        if basis.n != n or basis.m != m:
            raise ValueError("basis does not match the model's shape")
        self.status = np.concatenate([basis.col_status, basis.row_status]).astype(np.int8)
        self._basis_in = basis
        self.factor = None
        self.reused = False
        self.refactor_every = options.refactor_every
        self.timings = {"factorize": 0.0}
        self.sc = None
        self.scaling_reused = False
        if state is not None and options.scale:
            self.reused = self._reuse(state)  # sets the scaling even when the factorization is too old
        if self.sc is None:
            self.sc = compute_scaling(lp.A) if options.scale else Scaling(np.ones(m), np.ones(n))
            self.A = scale_matrix(lp.A, self.sc) if options.scale else sp.csc_matrix(lp.A)
        R, S = self.sc.row, self.sc.col
        self.AT = sp.csr_matrix(self.A.T)  # row-wise copy for pivot rows
        # the pivot row's nonzeros, see pivot_row (32-bit positions below 2^31 variables)
        self._row_nz = np.empty(n + m, dtype=np.int32 if n + m < 2**31 - 1 else np.int64)
        self._row_vals = np.empty(n + m)
        self.cost_true = np.concatenate([lp.sense * lp.c * S, np.zeros(m)])
        self.cost = self.cost_true.copy()
        self.lower = np.concatenate([lp.col_lower / S, lp.row_lower * R])
        self.upper = np.concatenate([lp.col_upper / S, lp.row_upper * R])
        self.lower_true = self.lower.copy()
        self.upper_true = self.upper.copy()
        self.cost_shifted = False
        self.bounds_shifted = False

        if not self.reused:
            basic = np.flatnonzero(self.status == BASIC)
            if basic.size != m:
                raise SingularBasis(f"basis has {basic.size} basic variables for {m} rows")
            self.basic_idx = basic.astype(np.int64)
        self.x = np.zeros(self.N)
        self.dse = np.ones(m)
        self.dse_stale = False
        self.rule_override = None
        self.devex = np.ones(self.N)
        self.iteration = 0
        self.algorithms: list[str] = []
        self.pivot_log: list[dict] = []
        self.log_dropped = 0
        self.events: list[dict] = []
        self._col_names, self._row_names = lp.col_names, lp.row_names  # for pivot records
        self.rng = np.random.default_rng(20261201)
        self._visited: set[int] = set()  # vertices seen since the objective last moved

    @staticmethod
    def reuse_applies(
        lp: LinearProgram, basis: Basis, state: EngineState | None, options: SolveOptions
    ) -> bool:
        """True when ``state``'s factorization fits: the model only gained rows
        (costs and bounds may differ), the basic set is the old one plus the new
        rows' logicals, and the cached factorization is still young."""
        return Simplex._factor_fits(lp, basis, state, options) and Simplex.only_rows_appended(lp, state)

    @staticmethod
    def _factor_fits(
        lp: LinearProgram, basis: Basis, state: EngineState | None, options: SolveOptions
    ) -> bool:
        """reuse_applies but for the matrix (only_rows_appended, the one check that reads all of A)."""
        if state is None or not options.scale:
            return False
        n, m = lp.n, lp.m
        m0 = state.A.shape[0]
        if state.A.shape[1] != n or m < m0 or getattr(state.factor, "depth", 0) >= MAX_REUSE_DEPTH:
            return False
        if state.factor.updates >= 0.75 * _refactor_interval(state.factor, options):
            return False  # too close to its next refactorization to be worth wrapping
        status = np.concatenate([basis.col_status, basis.row_status])
        basic_now = np.flatnonzero(status == BASIC)
        expected = np.sort(np.concatenate([state.basic_idx, n + np.arange(m0, m)]))
        return basic_now.size == m and np.array_equal(expected, basic_now)

    @staticmethod
    def only_rows_appended(lp: LinearProgram, state: EngineState) -> bool:
        """True when ``lp``'s matrix is ``state``'s with rows appended (its scaling then still fits)."""
        return rows_appended(lp.A, state.A)

    def _reuse(self, state: EngineState) -> bool:
        """Adopt a previous solve's scaling and factorization (see reuse_applies).

        When only the factorization is unfit (too old, too deep, another basic
        set) but the matrix only gained rows, the scaling is still kept (new
        rows scaled against the kept column scales), which spares recomputing
        it; the caller then factorizes afresh. Returns True when the
        factorization was adopted."""
        if not self.only_rows_appended(self.lp, state):
            return False
        full = self._factor_fits(self.lp, self._basis_in, state, self.opt)
        lp, n, m = self.lp, self.n, self.m
        A = lp.A
        m0 = state.A.shape[0]
        basic_idx = np.concatenate([state.basic_idx, n + np.arange(m0, m)]).astype(np.int64)
        S = state.scaling.col
        R_new = np.ones(m - m0)
        C = None
        if m > m0:
            # the appended rows' entries sit at the end of each column (indices are sorted): take them
            # column-wise as they are, scaled with the kept column scales and a geometric-mean row scale
            new = A.indices >= m0
            per_col = np.diff(np.concatenate([[0], np.cumsum(new)])[A.indptr])
            add_ptr = np.concatenate([[0], np.cumsum(per_col)])
            add_rows = (A.indices[new] - m0).astype(np.int64)
            cols = np.repeat(np.arange(n), per_col)
            vals = A.data[new] * S[cols]
            nz = vals != 0.0  # explicit zeros carry no scale (as in compute_scaling)
            logs = np.log2(np.abs(vals[nz]))
            rmax = np.full(m - m0, -np.inf)
            rmin = np.full(m - m0, np.inf)
            np.maximum.at(rmax, add_rows[nz], logs)
            np.minimum.at(rmin, add_rows[nz], logs)
            has = np.isfinite(rmax)
            R_new[has] = np.exp2(np.round(np.clip(-0.5 * (rmax[has] + rmin[has]), -60, 60)))
            vals = vals * R_new[add_rows]
            old_A = state.A_scaled
            ptr, idx, val = kernels.append_rows_csc(
                old_A.indptr, old_A.indices, old_A.data,
                add_ptr.astype(old_A.indptr.dtype), add_rows.astype(old_A.indices.dtype), vals, m0,
            )  # fmt: skip
            self.A = sp.csc_matrix((val, idx, ptr), shape=(m, n))
            if full:
                # the border: the new rows over the old basic columns, in basis order; held as the
                # CSC of C (= the CSR of C^T), gathered column by column
                struct = np.flatnonzero(state.basic_idx < n)
                picked = state.basic_idx[struct]
                counts = np.zeros(m0, dtype=np.int64)
                counts[struct] = per_col[picked]
                c_ptr = np.concatenate([[0], np.cumsum(counts)])
                sel = picked[counts[struct] > 0]
                lens, starts = per_col[sel], add_ptr[sel]
                take = np.repeat(starts - (np.cumsum(lens) - lens), lens) + np.arange(lens.sum())
                C = sp.csr_matrix((vals[take], add_rows[take], c_ptr), shape=(m0, m - m0)).T
        else:
            self.A = state.A_scaled
        self.sc = Scaling(np.concatenate([state.scaling.row, R_new]), S)
        if not full:
            self.scaling_reused = True
            return False
        if C is None:
            C = sp.csr_matrix((0, m0))
        self.basic_idx = basic_idx
        self.factor = BorderedFactor(state.factor, C)
        self._adapt_refactor_interval()
        return True

    # ----------------------------------------------------------- linear algebra
    def column(self, j: int) -> np.ndarray:
        a = np.zeros(self.m)
        if j < self.n:
            lo, hi = self.A.indptr[j], self.A.indptr[j + 1]
            a[self.A.indices[lo:hi]] = self.A.data[lo:hi]
        else:
            a[j - self.n] = -1.0
        return a

    def row_product(self, rho: np.ndarray) -> np.ndarray:
        """alpha_r = Af^T rho for all N variables."""
        return np.concatenate([self.AT @ rho, -rho])

    def pivot_row(self, rho: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """alpha_r = Af^T rho at the nonbasic variables, as its nonzeros: positions
        (increasing) and entries (kernels.pivot_row); views of buffers that
        every pivot reuses."""
        count = kernels.pivot_row(
            self.AT.indptr, self.AT.indices, self.AT.data, rho, self.status, self.n, self._row_nz, self._row_vals
        )
        return self._row_nz[:count], self._row_vals[:count]

    @staticmethod
    def row_entry(nz: np.ndarray, vals: np.ndarray, j: int) -> float:
        """Entry j of a pivot row given as (nz, vals)."""
        e = int(np.searchsorted(nz, j))
        return float(vals[e]) if e < nz.size and nz[e] == j else 0.0

    def times_af(self, v: np.ndarray) -> np.ndarray:
        """Af @ v."""
        return self.A @ v[: self.n] - v[self.n :]

    def refactor(self, reason: str) -> None:
        t = time.perf_counter()
        bcols = self.basic_idx
        B = self._basis_matrix(bcols)
        self.factor = Factor(B)
        self.timings["factorize"] += time.perf_counter() - t
        self._adapt_refactor_interval()
        self.events.append({"event": "refactor", "iteration": self.iteration, "reason": reason})
        self.compute_primal()
        self.compute_dual()

    def _adapt_refactor_interval(self) -> None:
        self.refactor_every = _refactor_interval(self.factor, self.opt)

    def _basis_matrix(self, bcols: np.ndarray) -> sp.csc_matrix:
        ptr, idx, val = kernels.basis_csc(self.A.indptr, self.A.indices, self.A.data, self.n, bcols)
        return sp.csc_matrix((val, idx, ptr), shape=(self.m, self.m))

    def nonbasic_values(self) -> None:
        st = self.status
        lo, up = self.lower, self.upper
        x = self.x
        x[st == AT_LOWER] = lo[st == AT_LOWER]
        x[st == AT_UPPER] = up[st == AT_UPPER]
        x[st == FIXED] = lo[st == FIXED]
        x[st == FREE] = 0.0

    def compute_primal(self) -> None:
        self.nonbasic_values()
        xn = self.x.copy()
        xn[self.basic_idx] = 0.0
        rhs = -self.times_af(xn)
        xb = self.factor.ftran(rhs)
        self.x[self.basic_idx] = xb
        resid = self.times_af(self.x)
        scale = 1.0 + np.abs(rhs).max(initial=0.0)
        if not np.isfinite(xb).all() or np.abs(resid).max(initial=0.0) > 1e-6 * scale:
            raise NumericalTrouble(
                "inaccurate_factorization", "primal residual too large after refactorization"
            )

    def compute_dual(self) -> None:
        self.y = self.factor.btran(self.cost[self.basic_idx])
        self.d = self.cost - self.row_product(self.y)
        self.d[self.basic_idx] = 0.0

    # ------------------------------------------------------------- feasibility
    def primal_infeasibilities(self) -> np.ndarray:
        """Per basic row: amount below lower (negative) or above upper (positive)."""
        return self._primal_infeasibilities_and_sum()[0]

    def _primal_infeasibilities_and_sum(self) -> tuple[np.ndarray, float]:
        """primal_infeasibilities and the sum of their magnitudes, in one pass."""
        out = np.empty(self.m)
        total = kernels.primal_infeasibilities(self.x, self.basic_idx, self.lower, self.upper, out)
        return out, total

    def dual_infeasibilities(self) -> np.ndarray:
        """Per variable: how far d is on the wrong side for its nonbasic status."""
        st = self.status
        inf = np.maximum(-self.d * _DUAL_SIGN[st], 0.0)
        free = st == FREE
        if free.any():
            inf[free] = np.abs(self.d[free])
        return inf

    def primal_feasible(self) -> bool:
        return np.abs(self.primal_infeasibilities()).max(initial=0.0) <= self.opt.primal_tol

    def dual_feasible(self) -> bool:
        return self.dual_infeasibilities().max(initial=0.0) <= self.opt.dual_tol

    def objective(self) -> float:
        return float(self.cost_true @ self.x)

    # -------------------------------------------------------------- bookkeeping
    def check_limits(self) -> None:
        if self.iteration >= self.opt.max_iterations:
            raise LimitReached("iteration_limit")
        if time.perf_counter() - self.t0 > self.opt.time_limit:
            raise LimitReached("time_limit")

    def log(self, *args, **kwargs) -> None:
        """Append a pivot record (built only when the log still has room)."""
        if len(self.pivot_log) < self.opt.log_limit:
            self.pivot_log.append(self._pivot_record(*args, **kwargs))
        else:
            self.log_dropped += 1

    def _name(self, j: int) -> str:
        return self._col_names[j] if j < self.n else self._row_names[j - self.n]

    def _kind(self, j: int) -> str:
        return "variable" if j < self.n else "constraint"

    def _pivot_record(
        self, algorithm, p, leave_bound, q, pivot, step, flips, pinf=None, dinf=None, objective=None
    ) -> dict:
        """One pivot-log entry. The sums (primal and dual infeasibility, the
        objective in scaled terms) are computed here unless the caller has them."""
        if pinf is None:
            pinf = self._primal_infeasibilities_and_sum()[1]
        if dinf is None:
            dinf = kernels.dual_infeasibility_sum(self.d, self.status)
        if objective is None:
            objective = self.objective()
        return {
            "iteration": self.iteration,
            "algorithm": algorithm,
            "leaving": self._name(p) if p is not None else None,
            "leaving_kind": self._kind(p) if p is not None else None,
            "leaving_bound": leave_bound,
            "entering": self._name(q),
            "entering_kind": self._kind(q),
            "pivot": float(pivot) if pivot is not None else None,
            "step": float(step),
            "objective": self.lp.sense * objective + self.lp.offset,
            "primal_infeasibility": float(pinf),
            "dual_infeasibility": float(dinf),
            "bound_flips": int(flips),
        }

    def revisits_basis(self) -> bool:
        """Record the current vertex of a degenerate stretch; True when it was
        visited before in the same stretch, i.e. the pivots are cycling. The
        vertex is the status of every variable (the basic set and the bound
        each nonbasic sits at: bound flips without a basis change count)."""
        key = hash(self.status.tobytes())
        if key in self._visited:
            self._visited.clear()
            return True
        self._visited.add(key)
        return False

    def basis_change(self, r: int, q: int, alpha_q: np.ndarray, leave_status: int) -> bool:
        """Swap q into row r's basis position. True when that triggered a
        refactorization (x, y and d were then recomputed from scratch)."""
        p = int(self.basic_idx[r])
        self.status[p] = FIXED if self.lower[p] == self.upper[p] else leave_status
        self.status[q] = BASIC
        self.basic_idx[r] = q
        self.factor.update(r, alpha_q)
        self.iteration += 1
        if self.factor.updates >= self.refactor_every:
            self.refactor("update_limit")
            return True
        return False

    # ================================================================ dual
    def shift_costs_for_dual_feasibility(self) -> int:
        """Make the current basis dual feasible: flip boxed, shift the rest."""
        dinf = self.dual_infeasibilities()
        bad = np.flatnonzero(dinf > self.opt.dual_tol)
        if bad.size == 0:
            return 0
        st = self.status
        boxed = np.isfinite(self.lower[bad]) & np.isfinite(self.upper[bad])
        flip = bad[boxed & (st[bad] != FREE)]
        st[flip[st[flip] == AT_LOWER]] = 9  # temporary marker
        st[flip[st[flip] == AT_UPPER]] = AT_LOWER
        st[st == 9] = AT_UPPER
        shift = bad[~(boxed & (st[bad] != FREE))]
        margin = 10 * self.opt.dual_tol * (1.0 + self.rng.random(shift.size))
        target = np.where(st[shift] == AT_LOWER, margin, np.where(st[shift] == AT_UPPER, -margin, 0.0))
        self.cost[shift] += target - self.d[shift]
        self.d[shift] = target
        if shift.size:
            self.cost_shifted = True
        if flip.size:
            self.compute_primal()
        return int(bad.size)

    def perturb_costs(self) -> None:
        """Widen dual feasibility margins of nonbasics to break dual degeneracy."""
        st = self.status
        mag = 1e-6 * (1.0 + np.abs(self.cost_true)) * (0.5 + self.rng.random(self.N))
        delta = np.where(st == AT_LOWER, mag, np.where(st == AT_UPPER, -mag, 0.0))
        self.cost += delta
        self.d += delta
        self.cost_shifted = True
        self.events.append({"event": "perturb", "iteration": self.iteration, "reason": "dual_stall"})

    def _choose_row(self, infeas: np.ndarray) -> int:
        rule = _ROW_RULES[self.rule_override or self.opt.dual_pricing]
        return int(kernels.choose_row(infeas, self.dse, self.basic_idx, self.opt.primal_tol, rule))

    def _dual_ratio_test(self, r: int, nz: np.ndarray, vals: np.ndarray, delta: float):
        """Harris two-pass ratio test with bound flipping (kernels.dual_ratio_test)
        over the pivot row's nonzeros (positions nz, entries vals).

        Returns (q, t, flips, dinf, alpha_rq) with q = -1 when no column can
        enter, dinf the dual infeasibility of the nz columns before the pivot
        and alpha_rq the entering column's pivot-row entry.
        The step t keeps every reduced cost dual feasible (within tolerance):
        among the columns whose pivot-row entry can restore row r, the
        breakpoints d_j / |alpha_rj| are passed in increasing order, boxed
        columns flip while the infeasibility |delta| left pays for them, and
        the column at the first breakpoint that cannot be passed enters.
        """
        s = 1.0 if delta < 0 else -1.0
        bland = (self.rule_override or self.opt.dual_pricing) == "smallest_index"
        q, t, flips, dinf, alpha_rq = kernels.dual_ratio_test(
            self.status, vals, nz, nz.size, self.d, self.lower, self.upper, s,
            self.opt.pivot_tol, self.opt.dual_tol, self.opt.primal_tol, abs(delta), not bland, bland,
        )  # fmt: skip
        return int(q), float(t), flips, dinf, float(alpha_rq)

    def _flip_column(self, flip_idx: np.ndarray) -> np.ndarray:
        """Af @ dx for the bound flips (to be FTRAN'd with the entering column)."""
        st = self.status
        to_upper = st[flip_idx] == AT_LOWER
        new = np.where(to_upper, self.upper[flip_idx], self.lower[flip_idx])
        A = self.A
        return kernels.flip_column(
            A.indptr, A.indices, A.data, self.n, self.m, flip_idx, new - self.x[flip_idx]
        )

    def _flip_status(self, flip_idx: np.ndarray) -> None:
        st = self.status
        to_upper = st[flip_idx] == AT_LOWER
        st[flip_idx] = np.where(to_upper, AT_UPPER, AT_LOWER)
        self.x[flip_idx] = np.where(to_upper, self.upper[flip_idx], self.lower[flip_idx])

    def _dual(self) -> str:
        """Dual simplex from a dual feasible basis. Returns a terminal status."""
        self.algorithms.append("dual")
        self._visited.clear()
        ptol = self.opt.pivot_tol
        dse = self.opt.dual_pricing == "steepest_edge"
        if self.dse_stale:  # primal pivots changed the basis without updating them
            self.dse[:] = 1.0
            self.dse_stale = False
        best_obj = -np.inf
        since_progress = 0
        stalls = 0
        trouble = 0
        self.rule_override = None
        infeas = self.primal_infeasibilities()
        dinf = None  # the dual infeasibility sum, kept up to date by each pivot; None: recompute
        while True:
            self.check_limits()
            r = self._choose_row(infeas)
            if r < 0:
                return "optimal"
            if dinf is None:
                dinf = kernels.dual_infeasibility_sum(self.d, self.status)
            delta = float(infeas[r])
            p = int(self.basic_idx[r])
            e = np.zeros(self.m)
            e[r] = 1.0
            rho = self.factor.btran(e)
            if dse:
                self.dse[r] = max(float(rho @ rho), 1e-12)
            nz, vals = self.pivot_row(rho)
            q, t, flip_idx, dinf_row, alpha_rq = self._dual_ratio_test(r, nz, vals, delta)
            if q < 0:
                if self.factor.updates > 0:
                    self.refactor("confirm_infeasibility")
                    infeas = self.primal_infeasibilities()
                    dinf = None
                    continue
                if self._tiny_entries_could_repair(nz, vals, delta):
                    raise NumericalTrouble(
                        "unproven_infeasibility",
                        "only pivot-row entries below the pivot tolerance could repair the row",
                    )
                self._record_farkas(rho, p, r, delta)
                return "infeasible"
            # one FTRAN pass for the entering column, DSE's tau = B^-1 rho and the flips' shift
            tau = shift = None
            if dse and not flip_idx.size:  # the usual case: two vectors
                alpha_q, tau = self.factor.ftran_pair(self.column(q), rho)
            else:
                cols = [self.column(q)]
                if dse:
                    cols.append(rho)
                if flip_idx.size:
                    cols.append(self._flip_column(flip_idx))
                sol = self.factor.ftran_many(np.column_stack(cols))
                alpha_q = np.ascontiguousarray(sol[:, 0])
                tau = np.ascontiguousarray(sol[:, 1]) if dse else None
                shift = np.ascontiguousarray(sol[:, -1]) if flip_idx.size else None
            piv = alpha_q[r]
            if abs(piv) < ptol or abs(piv - alpha_rq) > 1e-6 * (1.0 + abs(piv)):
                trouble += 1
                if trouble > 3:
                    raise NumericalTrouble("unstable_pivot", f"pivot {piv:.3e} vs row entry {alpha_rq:.3e}")
                self.refactor("pivot_mismatch")
                infeas = self.primal_infeasibilities()
                dinf = None
                continue
            trouble = 0
            s = 1.0 if delta < 0 else -1.0
            # bound flips, then the primal step that takes x_p to its violated bound
            bound = self.lower[p] if delta < 0 else self.upper[p]
            if flip_idx.size:
                self._flip_status(flip_idx)
            theta_p = kernels.dual_primal_step(
                self.x, self.basic_idx, alpha_q, _NO_SHIFT if shift is None else shift, r, bound, piv
            )
            self.x[q] += theta_p
            self.x[p] = bound
            # dual steepest edge weights (Forrest and Goldfarb 1992)
            if dse:
                kernels.update_dse(self.dse, alpha_q, tau, piv, r)
            leave_status = AT_LOWER if delta < 0 else AT_UPPER
            refactored = self.basis_change(r, q, alpha_q, leave_status)
            self.x[p] = bound
            if refactored:  # x, y and d were recomputed from the new factorization
                dinf = kernels.dual_infeasibility_sum(self.d, self.status)
            else:
                # dual update d_j += s * t * alpha_rj over the row's nonzeros (none at the old
                # basics), done after the statuses changed (it does not depend on them) so that
                # it also gives the new dual infeasibility of those columns; the leaving
                # variable's reduced cost is s * t, the entering one's 0. The running sum
                # changes only there: the row's columns (flips and q among them) and p.
                self.d[p] = s * t
                dinf_row_after = kernels.dual_update(self.d, self.y, vals, nz, nz.size, rho, s * t, self.status)
                self.d[q] = 0.0
                dinf_p = max(-self.d[p] * _DUAL_SIGN[self.status[p]], 0.0)  # p leaves to a bound, never free
                dinf = max(0.0, dinf - dinf_row + dinf_row_after + float(dinf_p))
            objective = float(self.cost_true @ self.x)
            obj = float(self.cost @ self.x) if self.cost_shifted else objective
            infeas, pinf = self._primal_infeasibilities_and_sum()
            self.log("dual", p, "lower" if delta < 0 else "upper", q, piv, theta_p, flip_idx.size,
                     pinf, dinf, objective)  # fmt: skip
            if obj > best_obj + 1e-13 * (1.0 + abs(obj)):  # (best_obj starts at -inf)
                best_obj = obj
                since_progress = 0
                self._visited.clear()
            else:
                since_progress += 1
                if self.revisits_basis():  # a cycle: no need to wait for the stall limit
                    since_progress = max(since_progress, self.opt.stall_limit)
                if since_progress >= self.opt.stall_limit:
                    # first remedy: perturb costs; second: the smallest-index rule
                    # for the rest of this phase; a third stall gives up
                    stalls += 1
                    since_progress = 0
                    if stalls == 1:
                        self.perturb_costs()
                        dinf = None
                        best_obj = -np.inf  # the objective is measured with new costs now
                    elif stalls == 2:
                        self.rule_override = "smallest_index"
                        self.events.append(
                            {"event": "rule_switch", "iteration": self.iteration, "reason": "dual_stall"}
                        )
                    else:
                        raise NumericalTrouble(
                            "stalled", "dual simplex made no progress after perturbing and Bland's rule"
                        )

    def _tiny_entries_could_repair(self, nz: np.ndarray, vals: np.ndarray, delta: float) -> bool:
        """Entries below the pivot tolerance are skipped by the ratio test; if one
        of them moves toward an infinite bound, the row might be repairable by an
        unbounded move and the "infeasible" verdict is not proven."""
        s = 1.0 if delta < 0 else -1.0
        st = self.status[nz]
        at = s * vals
        mag = np.abs(at)
        # below the pivot tolerance but above rounding noise (common practice: ~1e-12)
        tiny = (mag <= self.opt.pivot_tol) & (mag > 1e-12 * max(1.0, mag.max(initial=0.0)))
        up_free = ~np.isfinite(self.upper[nz])
        lo_free = ~np.isfinite(self.lower[nz])
        # at lower with at < 0 increases toward upper; at upper with at > 0 decreases toward lower
        risky = tiny & (
            ((st == AT_LOWER) & (at < 0) & up_free) | ((st == AT_UPPER) & (at > 0) & lo_free) | (st == FREE)
        )
        return bool(risky.any())

    def _record_farkas(self, rho: np.ndarray, p: int, r: int, delta: float) -> None:
        # rho_i is exactly zero in theory for every other basic logical
        # (rho^T B = e_r^T); drop the rounding noise there.
        others = self.basic_idx[self.basic_idx >= self.n] - self.n
        others = others[others != p - self.n]
        rho = rho.copy()
        rho[others] = 0.0
        rho[np.abs(rho) <= 1e-11 * np.abs(rho).max()] = 0.0  # drop tolerance
        self.farkas_rho = rho * (1.0 if delta < 0 else -1.0)
        self.infeasible_row = r

    # ================================================================ primal
    def perturb_bounds(self) -> None:
        """Relax bounds of basic variables slightly to break primal degeneracy."""
        b = self.basic_idx
        lo, up = self.lower[b], self.upper[b]
        mag = 1e-7 * (1.0 + np.maximum(np.abs(np.where(np.isfinite(lo), lo, 0)), 1.0))
        mag = mag * (0.5 + self.rng.random(b.size))
        self.lower[b] = np.where(np.isfinite(lo) & (lo < up), lo - mag, lo)
        self.upper[b] = np.where(np.isfinite(up) & (lo < up), up + mag, up)
        self.bounds_shifted = True
        self.events.append({"event": "perturb", "iteration": self.iteration, "reason": "primal_stall"})

    def _choose_column(self) -> int:
        score = self.dual_infeasibilities()  # how attractive each nonbasic is
        cand = np.flatnonzero(score > self.opt.dual_tol)
        if cand.size == 0:
            return -1
        if self.opt.primal_pricing == "devex":
            return int(cand[np.argmax(score[cand] ** 2 / self.devex[cand])])
        return int(cand[np.argmax(score[cand])])

    def _primal_ratio_test(self, q: int, direction: float, alpha_q: np.ndarray):
        """Harris two-pass; returns (r, step, leave_status) with r = -1 for a bound flip
        of the entering variable and r = -2 for an unbounded direction."""
        b = self.basic_idx
        at = direction * alpha_q  # basics move by -step * at
        ptol = self.opt.pivot_tol
        tol = self.opt.primal_tol
        xb = self.x[b]
        lo, up = self.lower[b], self.upper[b]
        dec = (at > ptol) & np.isfinite(lo)
        inc = (at < -ptol) & np.isfinite(up)
        idx = np.flatnonzero(dec | inc)
        own = self.upper[q] - self.lower[q]
        if idx.size == 0:
            if np.isfinite(own):
                return -1, own, 0
            return -2, np.inf, 0
        a = at[idx]
        room = np.where(a > 0, xb[idx] - lo[idx], up[idx] - xb[idx])
        # a basic already outside its bound by more than tol (rounding spread by
        # a refactorization) must not make the Harris bound negative
        harris = (np.maximum(room, 0.0) + tol) / np.abs(a)
        tmax = harris.min()
        if np.isfinite(own) and own <= tmax:
            return -1, own, 0
        ratio = np.maximum(room, 0.0) / np.abs(a)
        group = np.flatnonzero(ratio <= tmax)
        best = group[np.argmax(np.abs(a[group]))]
        r = int(idx[best])
        leave_status = AT_LOWER if a[best] > 0 else AT_UPPER
        return r, float(ratio[best]), leave_status

    def _primal(self) -> str:
        self.algorithms.append("primal")
        self._visited.clear()
        self.dse_stale = True
        best_obj = np.inf
        since_progress = 0
        perturbed = False
        trouble = 0
        self.devex[:] = 1.0
        while True:
            self.check_limits()
            q = self._choose_column()
            if q < 0:
                return "optimal"
            direction = -1.0 if self.d[q] > 0 else 1.0
            alpha_q = self.factor.ftran(self.column(q))
            r, step, leave_status = self._primal_ratio_test(q, direction, alpha_q)
            if r == -2:
                ray = np.zeros(self.N)
                ray[q] = direction
                ray[self.basic_idx] = -direction * alpha_q
                self.ray_full = ray
                return "unbounded"
            if r == -1:
                # entering variable moves to its other bound; no basis change
                self.x[q] += direction * step
                self.x[self.basic_idx] -= direction * step * alpha_q
                self.status[q] = AT_UPPER if direction > 0 else AT_LOWER
                self.iteration += 1
                self.log("primal", None, None, q, None, step, 1)
                continue
            piv = alpha_q[r]
            e = np.zeros(self.m)
            e[r] = 1.0
            rho = self.factor.btran(e)
            nz, vals = self.pivot_row(rho)  # the nonbasic columns' entries (q is not basic yet)
            alpha_rq = self.row_entry(nz, vals, q)
            if abs(piv) < self.opt.pivot_tol or abs(piv - alpha_rq) > 1e-6 * (1.0 + abs(piv)):
                trouble += 1
                if trouble > 3:
                    raise NumericalTrouble("unstable_pivot", f"pivot {piv:.3e} vs row entry {alpha_rq:.3e}")
                self.refactor("pivot_mismatch")
                continue
            trouble = 0
            p = int(self.basic_idx[r])
            # primal update
            self.x[self.basic_idx] -= direction * step * alpha_q
            self.x[q] += direction * step
            bound = self.lower[p] if leave_status == AT_LOWER else self.upper[p]
            # dual update along the pivot row
            dq = self.d[q]
            self.d[nz] -= (dq / piv) * vals
            self.y += (dq / piv) * rho
            self.d[p] = -dq / piv
            self.d[q] = 0.0
            # devex reference weights (Harris 1973), simplified update
            if self.opt.primal_pricing == "devex":
                wq = self.devex[q]
                self.devex[nz] = np.maximum(self.devex[nz], (vals / piv) ** 2 * wq)
                self.devex[p] = max(wq / piv**2, 1.0)
            self.basis_change(r, q, alpha_q, leave_status)
            self.x[p] = bound
            self.log("primal", p, "lower" if leave_status == AT_LOWER else "upper", q, piv, step, 0)
            obj = float(self.cost @ self.x)
            if obj < best_obj - 1e-13 * (1.0 + abs(obj)):  # (best_obj starts at +inf)
                best_obj = obj
                since_progress = 0
                self._visited.clear()
            else:
                since_progress += 1
                if self.revisits_basis():  # a cycle: no need to wait for the stall limit
                    since_progress = max(since_progress, self.opt.stall_limit)
                if since_progress >= self.opt.stall_limit:
                    if perturbed:
                        raise NumericalTrouble(
                            "stalled", f"primal simplex made no progress in {since_progress} pivots"
                        )
                    self.perturb_bounds()
                    perturbed = True
                    since_progress = 0
                    best_obj = np.inf
                    self.compute_primal()

    # ================================================================ driver
    def remove_shifts(self) -> None:
        changed = False
        if self.cost_shifted:
            self.cost = self.cost_true.copy()
            self.cost_shifted = False
            changed = True
        if self.bounds_shifted:
            self.lower = self.lower_true.copy()
            self.upper = self.upper_true.copy()
            self.bounds_shifted = False
            changed = True
        if changed:
            self.refactor("remove_perturbation")

    def run(self) -> SimplexOutcome:
        status = "optimal"
        try:
            if self.reused:
                try:
                    self.compute_primal()
                    self.compute_dual()
                    self.events.append({"event": "reuse", "iteration": 0, "reason": "cached_factorization"})
                except NumericalTrouble:
                    self.refactor("reuse_inaccurate")
            else:
                if self.scaling_reused:
                    self.events.append({"event": "reuse", "iteration": 0, "reason": "cached_scaling"})
                self.refactor("initial")
            for _round in range(12):
                pf = self.primal_feasible()
                df = self.dual_feasible()
                if pf and df:
                    if self.cost_shifted or self.bounds_shifted:
                        self.remove_shifts()
                        continue
                    status = "optimal"
                    break
                if not pf:
                    if not df:
                        self.shift_costs_for_dual_feasibility()
                    status = self._dual()
                    if status == "infeasible":
                        break
                else:
                    if self.cost_shifted:
                        self.remove_shifts()
                        continue
                    status = self._primal()
                    if status == "unbounded":
                        break
            else:
                raise NumericalTrouble("no_convergence", "dual/primal alternation did not settle")
        except LimitReached as lim:
            status = lim.status
        if status in ("optimal",) and (self.cost_shifted or self.bounds_shifted):
            raise NumericalTrouble("perturbation_left", "could not remove perturbations")
        return self._outcome(status)

    def snapshot(self) -> EngineState:
        """The state a later solve of this model can reuse (see reuse_applies)."""
        return EngineState(self.lp.A, self.sc, self.A, self.basic_idx.copy(), self.factor)

    def _outcome(self, status: str) -> SimplexOutcome:
        n = self.n
        S, R = self.sc.col, self.sc.row
        x = self.x[:n] * S
        # duals from a fresh BTRAN with the true costs
        y_s = self.factor.btran(self.cost_true[self.basic_idx])
        y = y_s * R
        st = self.status.copy()
        basis = Basis(st[:n], st[n:])
        out = SimplexOutcome(
            status=status,
            x=x,
            y=y,
            basis=basis,
            pivots=self.iteration,
            algorithms=self.algorithms,
            pivot_log=self.pivot_log,
            log_dropped=self.log_dropped,
            events=self.events,
            timings=self.timings,
            state=self.snapshot(),
        )
        if status == "infeasible":
            out.farkas = self.farkas_rho * R
        if status == "unbounded":
            out.ray = self.ray_full[:n] * S
        return out
