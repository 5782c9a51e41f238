"""Warm re-optimization after one disruption cut, measured side by side in one run.

    python -m tests.bench.bench_warm [--rows 10000] [--repeat 3] [--seed 0] [--kind outage|lane]

Steps: generate a supply-chain LP near the requested row count, cold-solve it
(service.lp.solve, HiGHS), append a capacity row that cuts off the optimal
plan, carry the basis over with service.lp.remap, then time
  (a) service.lp.reoptimize from that basis (ours, warm),
  (b) scipy.optimize.linprog(method="highs") on the changed model from scratch,
  (c) HiGHS's own simplex warm-started from the same basis (highspy).
Prints a table and the two target ratios (scipy cold / ours >= 10 at 10k rows,
our pivots / HiGHS warm pivots <= 1.5). A missing or failing engine is
reported and the other measurements still run.
"""

from __future__ import annotations

import argparse
import re
import statistics
import sys
import time
import traceback
from dataclasses import dataclass, field

import highspy
import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog

from service.lp import Basis, LinearProgram, SolveOptions, Status, remap
from service.scenarios.supply_chain import cutting_capacity_row, sized, with_rows

_TO_HIGHS = {
    Status.BASIC: highspy.HighsBasisStatus.kBasic,
    Status.AT_LOWER: highspy.HighsBasisStatus.kLower,
    Status.AT_UPPER: highspy.HighsBasisStatus.kUpper,
    Status.FIXED: highspy.HighsBasisStatus.kLower,
    Status.FREE: highspy.HighsBasisStatus.kZero,
}
_FROM_HIGHS = {
    highspy.HighsBasisStatus.kBasic: Status.BASIC,
    highspy.HighsBasisStatus.kLower: Status.AT_LOWER,
    highspy.HighsBasisStatus.kUpper: Status.AT_UPPER,
    highspy.HighsBasisStatus.kZero: Status.FREE,
    highspy.HighsBasisStatus.kNonbasic: Status.AT_LOWER,
}


@dataclass
class Measure:
    label: str
    seconds: list[float] = field(default_factory=list)
    pivots: int | None = None
    objective: float | None = None
    status: str = ""
    note: str = ""

    @property
    def best(self) -> float | None:
        return min(self.seconds) if self.seconds else None

    @property
    def median(self) -> float | None:
        return statistics.median(self.seconds) if self.seconds else None


def _highs_model(lp: LinearProgram) -> highspy.Highs:
    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    model = highspy.HighsLp()
    A = lp.A.tocsc()
    model.num_col_, model.num_row_ = lp.n, lp.m
    model.col_cost_ = lp.c
    model.offset_ = lp.offset
    model.col_lower_, model.col_upper_ = lp.col_lower, lp.col_upper
    model.row_lower_, model.row_upper_ = lp.row_lower, lp.row_upper
    model.sense_ = highspy.ObjSense.kMinimize if lp.sense == 1 else highspy.ObjSense.kMaximize
    model.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    model.a_matrix_.start_, model.a_matrix_.index_, model.a_matrix_.value_ = A.indptr, A.indices, A.data
    h.passModel(model)
    h.setOptionValue("solver", "simplex")
    return h


def highs_cold_basis(lp: LinearProgram) -> tuple[Basis, float, float]:
    """Cold solve with highspy directly (used only when service.lp.solve is not usable)."""
    h = _highs_model(lp)
    start = time.perf_counter()
    h.run()
    seconds = time.perf_counter() - start
    hb = h.getBasis()
    basis = Basis(
        np.array([_FROM_HIGHS[s] for s in hb.col_status], dtype=np.int8),
        np.array([_FROM_HIGHS[s] for s in hb.row_status], dtype=np.int8),
    )
    return basis, h.getInfo().objective_function_value, seconds


def highs_warm(lp: LinearProgram, basis: Basis) -> tuple[int, float, float, str]:
    """HiGHS simplex from our basis: (pivots, seconds of run(), objective, status).

    Row statuses follow HiGHS's own reading (at_lower = activity at the row's lower bound).
    """
    h = _highs_model(lp)
    h.setOptionValue("presolve", "off")  # a presolved model would not use the basis
    hb = highspy.HighsBasis()
    hb.col_status = [_TO_HIGHS[Status(s)] for s in basis.col_status]
    hb.row_status = [_TO_HIGHS[Status(s)] for s in basis.row_status]
    hb.valid = True
    h.setBasis(hb)
    start = time.perf_counter()
    h.run()
    seconds = time.perf_counter() - start
    info = h.getInfo()
    status = h.modelStatusToString(h.getModelStatus())
    return info.simplex_iteration_count, seconds, info.objective_function_value, status


def linprog_arrays(lp: LinearProgram) -> dict:
    """The model in scipy.optimize.linprog's form (<= rows, = rows, column bounds); min sense."""
    A = lp.A.tocsr()
    eq = lp.row_lower == lp.row_upper
    up = ~eq & np.isfinite(lp.row_upper)
    lo = ~eq & np.isfinite(lp.row_lower)
    A_ub = sp.vstack([A[up], -A[lo]], format="csr")
    b_ub = np.concatenate([lp.row_upper[up], -lp.row_lower[lo]])
    bounds = np.column_stack([lp.col_lower, lp.col_upper])
    return {
        "c": lp.sense * lp.c,
        "A_ub": A_ub if A_ub.shape[0] else None,
        "b_ub": b_ub if A_ub.shape[0] else None,
        "A_eq": A[eq] if eq.any() else None,
        "b_eq": lp.row_lower[eq] if eq.any() else None,
        "bounds": bounds,
    }


def _fmt(value: float | int | None, spec: str) -> str:
    width = int(re.match(r"\d*", spec).group() or 0)
    return "-".rjust(width) if value is None else format(value, spec)


def _agree(a: float | None, b: float | None, rel: float = 1e-6) -> bool | None:
    if a is None or b is None:
        return None
    return abs(a - b) <= rel * max(1.0, abs(a), abs(b))


def run(rows: int, repeat: int, seed: int, kind: str | None) -> int:
    t0 = time.perf_counter()
    lp = sized(rows, seed=seed)
    print(f"model {lp.name}: {lp.m} rows x {lp.n} columns, {lp.A.nnz} nonzeros "
          f"(generated in {time.perf_counter() - t0:.2f} s)")  # fmt: skip

    # Cold solve: the service's path first, highspy directly if the service cannot run yet.
    import service.lp as lp_api

    try:
        start = time.perf_counter()
        cold = lp_api.solve(lp, SolveOptions())
        cold_seconds = time.perf_counter() - start
        if cold.status != "optimal" or cold.basis is None:
            raise RuntimeError(f"cold solve ended {cold.status}: {cold.message}")
        basis, cold_objective, x = cold.basis, cold.objective, cold.x
        print(
            f"cold solve: service.lp.solve ({cold.method}) {cold_seconds:.2f} s, "
            f"objective {cold_objective:.6f}"
        )
    except Exception as exc:  # noqa: BLE001 - any failure here is reported, then worked around
        print(f"cold solve: service.lp.solve unusable ({type(exc).__name__}: {exc}); using highspy directly")
        basis, cold_objective, cold_seconds = highs_cold_basis(lp)
        h = _highs_model(lp)
        h.run()
        x = np.array(h.getSolution().col_value)
        print(f"cold solve: highspy {cold_seconds:.2f} s, objective {cold_objective:.6f}")

    cut = cutting_capacity_row(lp, np.asarray(x), seed=seed, kind=kind)
    new_lp = with_rows(lp, [cut])
    new_basis, report = remap(basis, lp.col_names, lp.row_names, new_lp)
    print(
        f"change: {cut.name}: {cut.description} (old plan violates it by {cut.violation(np.asarray(x)):.3f})"
    )
    print(f"remap: {report}")

    ours = Measure("ours: reoptimize (warm)")
    try:
        from service.lp import reoptimize

        for _ in range(repeat):
            start = time.perf_counter()
            result = reoptimize(new_lp, new_basis.copy(), SolveOptions())
            ours.seconds.append(time.perf_counter() - start)
        ours.pivots, ours.objective, ours.status = result.pivots, result.objective, result.status
        passed = result.check.get("passed") if isinstance(result.check, dict) else None
        ours.note = f"method={result.method} warm={result.warm} check_passed={passed}"
        if result.fallback:
            ours.note += f" FALLBACK={result.fallback}"
    except ImportError as exc:
        ours.status, ours.note = "unavailable", f"ImportError: {exc}"
    except Exception as exc:  # noqa: BLE001 - the benchmark reports engine failures instead of dying
        ours.status, ours.note = "error", f"{type(exc).__name__}: {exc}"
        traceback.print_exc()

    scipy_cold = Measure("scipy linprog highs (cold)")
    args = linprog_arrays(new_lp)
    for _ in range(repeat):
        start = time.perf_counter()
        res = linprog(method="highs", **args)
        scipy_cold.seconds.append(time.perf_counter() - start)
    scipy_cold.status = res.status == 0 and "optimal" or res.message
    scipy_cold.objective = None if res.fun is None else new_lp.sense * res.fun + new_lp.offset
    scipy_cold.pivots = getattr(res, "nit", None)

    highs = Measure("HiGHS simplex (warm, same basis)")
    helper = None
    try:
        from service.lp.highs_cold import highs_warm_pivots as helper  # noqa: PLC0415
    except ImportError:
        pass
    for _ in range(repeat):
        pivots, seconds, objective, status = highs_warm(new_lp, new_basis)
        highs.seconds.append(seconds)
    highs.pivots, highs.objective, highs.status = pivots, objective, status.lower()
    if helper is not None:
        try:
            helper_pivots = helper(new_lp, new_basis.copy())
            highs.note = f"service.lp.highs_cold.highs_warm_pivots says {helper_pivots}"
        except Exception as exc:  # noqa: BLE001
            highs.note = f"highs_warm_pivots failed: {type(exc).__name__}: {exc}"
    else:
        highs.note = "highspy called directly (service.lp.highs_cold.highs_warm_pivots not present)"

    print()
    print(f"{'run':34} {'best s':>9} {'median s':>9} {'pivots':>7} {'objective':>18}  status")
    for meas in (ours, scipy_cold, highs):
        print(
            f"{meas.label:34} {_fmt(meas.best, '9.4f')} {_fmt(meas.median, '9.4f')} "
            f"{_fmt(meas.pivots, '7d')} {_fmt(meas.objective, '18.6f')}  {meas.status}"
        )
        if meas.note:
            print(f"{'':34} {meas.note}")
    print()
    if ours.best:
        print(
            f"speed-up, scipy cold / ours warm (best of {repeat}): {scipy_cold.best / ours.best:8.2f}  "
            "(target >= 10)"
        )
    else:
        print("speed-up, scipy cold / ours warm: n/a (engine did not run)")
    if ours.pivots is not None and highs.pivots:
        ratio = ours.pivots / highs.pivots
        print(f"pivots, ours / HiGHS warm: {ours.pivots} / {highs.pivots} = {ratio:.2f}  (target <= 1.5)")
    else:
        print(f"pivots, ours / HiGHS warm: {ours.pivots} / {highs.pivots}")
    print(f"objectives agree to 1e-6 relative: ours vs scipy {_agree(ours.objective, scipy_cold.objective)}, "
          f"HiGHS warm vs scipy {_agree(highs.objective, scipy_cold.objective)}")  # fmt: skip
    return 0 if ours.status == "optimal" and _agree(ours.objective, scipy_cold.objective) else 1


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10000, help="target row count (2000 for the small mode)")
    parser.add_argument("--repeat", type=int, default=3, help="timed repetitions of each measurement")
    parser.add_argument("--seed", type=int, default=0, help="model and cut seed")
    parser.add_argument("--kind", choices=["outage", "lane"], default="outage", help="kind of cut")
    args = parser.parse_args(argv)
    return run(args.rows, max(1, args.repeat), args.seed, args.kind)


if __name__ == "__main__":
    sys.exit(main())
