"""End-to-end benchmark: PATCH over HTTP against scipy's cold solve of the changed model.

    python -m tests.bench.bench_http [--rows 10000] [--cuts lane,lane,outage] [--full] [--repeat 1]

Starts its own redis-server (AOF, appendfsync always) and gunicorn on free
loopback ports, POSTs a generated supply-chain model as MPS, then PATCHes one
cutting capacity row at a time (each on top of the previous). For every PATCH
it prints the wall time seen by the client, the method and pivots, the
server's Server-Timing phases, and scipy.optimize.linprog(method="highs")
solving the same changed model from scratch, timed in the same run, with the
ratio. ``--repeat K`` runs the whole sequence K times (a new model each time) and
ends with the median, lowest and highest ratio per cut: on a shared machine
one run can be 30% off. Not a test: timings depend on the machine and what
else runs on it.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests"))

from live_service import start_service  # noqa: E402

from service.lp import solve  # noqa: E402
from service.lp.mps import write_mps  # noqa: E402
from service.scenarios.supply_chain import cutting_capacity_row, sized, with_rows  # noqa: E402


def linprog_seconds(lp) -> tuple[float, float]:
    A = lp.A.tocsr()
    fin_u, fin_l = np.isfinite(lp.row_upper), np.isfinite(lp.row_lower)
    eq = fin_u & fin_l & (lp.row_upper == lp.row_lower)
    A_ub = sp.vstack([A[fin_u & ~eq], -A[fin_l & ~eq]])
    b_ub = np.r_[lp.row_upper[fin_u & ~eq], -lp.row_lower[fin_l & ~eq]]
    start = time.perf_counter()
    ref = linprog(
        lp.sense * lp.c, A_ub=A_ub, b_ub=b_ub, A_eq=A[eq], b_eq=lp.row_upper[eq],
        bounds=np.c_[lp.col_lower, lp.col_upper], method="highs",
    )  # fmt: skip
    return time.perf_counter() - start, lp.sense * ref.fun + lp.offset


def sequence(args, call, query: str):
    """POST the model, then PATCH one cut at a time; yields (cut name, ratio) per PATCH."""
    lp = sized(args.rows, seed=0)
    print(f"model: {lp.m} rows x {lp.n} columns, {lp.A.nnz} nonzeros")
    took, created, _ = call("POST", "/v1/models?fields=solve", write_mps(lp).encode(), "text/x-mps")
    print(f"create (cold HiGHS + store): {took:.2f} s, {created['status']}")
    model_id = created["id"]
    x = solve(lp).x
    for k, kind in enumerate(args.cuts.split(",")):
        cut = cutting_capacity_row(lp, x, seed=k, kind=kind)
        terms = {lp.col_names[j]: float(v) for j, v in zip(cut.columns, cut.coefficients)}
        bounds = {"lower": None if not np.isfinite(cut.lower) else float(cut.lower)}
        bounds["upper"] = None if not np.isfinite(cut.upper) else float(cut.upper)
        patch = {"constraints": {cut.name: {"terms": terms, **bounds}}}
        took, res, timing = call(
            "PATCH", f"/v1/models/{model_id}{query}", json.dumps(patch).encode(), "application/merge-patch+json"
        )
        lp = with_rows(lp, [cut])
        cold, objective = linprog_seconds(lp)
        agree = abs(objective - res["objective"]) <= 1e-6 * max(1.0, abs(objective))
        print(
            f"{cut.name}: PATCH {took * 1000:.0f} ms ({res['solve']['method']}, {res['solve']['pivots']} pivots)"
            f" | linprog cold {cold:.2f} s | ratio {cold / took:.1f} | objectives agree: {agree}"
        )
        print(f"    server phases (ms): {timing}")
        yield cut.name, cold / took
        x = solve(lp).x


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10000)
    parser.add_argument("--cuts", default="lane,lane,outage", help="kinds of rows to add, in order")
    parser.add_argument(
        "--full", action="store_true", help="ask for the default (whole) answer, not ?fields=solve"
    )
    parser.add_argument("--repeat", type=int, default=1, help="run the whole sequence this many times")
    args = parser.parse_args()
    query = "" if args.full else "?fields=solve"
    svc = start_service(Path(tempfile.mkdtemp(prefix="hb-bench-")), worker=False, appendonly=True)
    try:

        def call(method: str, path: str, body: bytes, ctype: str):
            headers = {"Authorization": f"Bearer {svc.key}", "Content-Type": ctype}
            req = urllib.request.Request(svc.base + path, data=body, method=method, headers=headers)
            start = time.perf_counter()
            with urllib.request.urlopen(req, timeout=600) as resp:
                data = resp.read()
                took = time.perf_counter() - start
                timing = f"{resp.headers.get('Server-Timing')}; answer {len(data) / 1e6:.2f} MB"
                return took, json.loads(data), timing

        ratios: dict[str, list[float]] = {}
        for run in range(1, args.repeat + 1):
            if args.repeat > 1:
                print(f"-- run {run} of {args.repeat}")
            for name, ratio in sequence(args, call, query):
                ratios.setdefault(name, []).append(ratio)
        if args.repeat > 1:
            print("ratio to scipy's cold solve, per cut over the runs: median (lowest - highest)")
            for name, values in ratios.items():
                print(f"    {name}: {np.median(values):.1f} ({min(values):.1f} - {max(values):.1f})")
    finally:
        for proc in (svc.api, svc.redis):
            proc.terminate()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
