"""The stateless peer for the load comparison: cold-solve each full changed model with scipy's linprog.

A WSGI app: ``POST /solve`` takes the same model document hotbasis takes (JSON) and answers
``{"status", "objective", "x"}``. Run with two processes, one per core:

    python -m gunicorn -w 2 -b 127.0.0.1:8760 tests.load.peer:app

It keeps nothing between requests: every request parses the whole model and solves it from scratch
(scipy.optimize.linprog, method "highs", HiGHS's own choice of algorithm), which is what a client
without a stored basis has to do.
"""

from __future__ import annotations

import math

import numpy as np
import orjson
import scipy.sparse as sp
from scipy.optimize import linprog


def solve_document(doc: dict) -> dict:
    names = list(doc["variables"])
    index = {n: j for j, n in enumerate(names)}
    variables = doc["variables"].values()
    sign = -1.0 if doc.get("sense") == "max" else 1.0
    c = np.array([sign * float(v.get("cost") or 0.0) for v in variables])
    lower = [v.get("lower", 0.0) for v in variables]
    upper = [v.get("upper") for v in variables]
    bounds = np.array(
        [[-np.inf if lo is None else lo for lo in lower], [np.inf if up is None else up for up in upper]]
    ).T
    ub_r, ub_c, ub_v, b_ub = [], [], [], []
    eq_r, eq_c, eq_v, b_eq = [], [], [], []
    for con in doc.get("constraints", {}).values():
        cols = [index[n] for n in con["terms"]]
        vals = list(con["terms"].values())
        lo, up = con.get("lower"), con.get("upper")
        if lo is not None and up is not None and lo == up:
            eq_r.extend([len(b_eq)] * len(cols))
            eq_c.extend(cols)
            eq_v.extend(vals)
            b_eq.append(lo)
            continue
        if up is not None:
            ub_r.extend([len(b_ub)] * len(cols))
            ub_c.extend(cols)
            ub_v.extend(vals)
            b_ub.append(up)
        if lo is not None:
            ub_r.extend([len(b_ub)] * len(cols))
            ub_c.extend(cols)
            ub_v.extend(-a for a in vals)
            b_ub.append(-lo)
    n = len(names)
    a_ub = sp.csr_matrix((ub_v, (ub_r, ub_c)), shape=(len(b_ub), n)) if b_ub else None
    a_eq = sp.csr_matrix((eq_v, (eq_r, eq_c)), shape=(len(b_eq), n)) if b_eq else None
    res = linprog(
        c, A_ub=a_ub, b_ub=b_ub or None, A_eq=a_eq, b_eq=b_eq or None, bounds=bounds, method="highs"
    )
    if res.status != 0:
        return {"status": "not_optimal", "message": res.message, "objective": None, "x": None}
    objective = sign * float(res.fun) + float(doc.get("objective_offset") or 0.0)
    return {"status": "optimal", "objective": objective if math.isfinite(objective) else None,
            "x": res.x.tolist()}  # fmt: skip


def app(environ, start_response):
    if environ.get("REQUEST_METHOD") != "POST" or environ.get("PATH_INFO") != "/solve":
        start_response("404 Not Found", [("Content-Type", "text/plain")])
        return [b"POST /solve\n"]
    length = int(environ.get("CONTENT_LENGTH") or 0)
    doc = orjson.loads(environ["wsgi.input"].read(length))
    body = orjson.dumps(solve_document(doc))
    start_response("200 OK", [("Content-Type", "application/json"), ("Content-Length", str(len(body)))])
    return [body]
