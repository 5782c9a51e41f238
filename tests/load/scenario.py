"""The load scenario's data: one ~2,000-row supply-chain model per client and its stream of new rows.

Each client k owns ``sized(2000, seed=k)`` and, again and again, adds one constraint that cuts off
its current plan: a plant outage or a lane cap, chosen exactly as
``service.scenarios.supply_chain.cutting_capacity_row`` chooses them (busiest five, picked by the
seed), but with the row and lane groups found once, so the client spends its time waiting for the
server rather than matching names (the client shares the 2 cores with the server).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import orjson

from service.document import to_document
from service.lp.model import LinearProgram
from service.scenarios.supply_chain import _CAP, _PW, CAPACITY_LOSS, sized

ROWS = 2000


@dataclass
class NewRow:
    name: str
    terms: dict[str, float]
    upper: float

    def patch(self) -> dict:
        return {"constraints": {self.name: {"terms": self.terms, "upper": self.upper}}}

    def fragment(self) -> bytes:
        """The row as a `"name": {...}` member of a document's constraints map."""
        return orjson.dumps({self.name: {"terms": self.terms, "upper": self.upper}})[1:-1]


class CutMaker:
    """New rows that the current plan violates (same rule as cutting_capacity_row)."""

    def __init__(self, lp: LinearProgram) -> None:
        self.col_names = lp.col_names
        csr = lp.A.tocsr()
        self.outages = []  # (label, columns, coefficients)
        for i, name in enumerate(lp.row_names):
            match = _CAP.match(name)
            if match:
                lo, hi = csr.indptr[i], csr.indptr[i + 1]
                self.outages.append(
                    (
                        f"outage[{match.group(1)},{match.group(2)}]",
                        csr.indices[lo:hi].copy(),
                        csr.data[lo:hi].copy(),
                    )
                )
        groups: dict[tuple[str, str, str], list[int]] = {}
        for j, name in enumerate(lp.col_names):
            match = _PW.match(name)
            if match:
                groups.setdefault(match.groups(), []).append(j)
        self.lanes = [
            (f"lanecap[{p}->{w},{t}]", np.asarray(cols, dtype=np.int64)) for (p, w, t), cols in groups.items()
        ]

    def cut(self, x: np.ndarray, seed: int, sequence: int) -> NewRow:
        rng = np.random.default_rng(seed)
        kind = ("outage", "lane")[int(rng.integers(2))]
        candidates = []  # (used, label, columns, coefficients)
        if kind == "outage":
            for label, cols, coefs in self.outages:
                used = float(coefs @ x[cols])
                if used > 1e-6:
                    candidates.append((used, label, cols, coefs))
        else:
            for label, cols in self.lanes:
                flow = float(x[cols].sum())
                if flow > 1e-6:
                    candidates.append((flow, label, cols, np.ones(cols.size)))
        if not candidates:
            raise ValueError(f"the plan uses no {kind} capacity that could be cut")
        candidates.sort(key=lambda item: -item[0])
        top = candidates[: min(5, len(candidates))]
        used, label, cols, coefs = top[int(rng.integers(len(top)))]
        terms = {self.col_names[j]: float(a) for j, a in zip(cols.tolist(), coefs.tolist()) if a}
        return NewRow(f"{label}#{sequence}", terms, round((1.0 - CAPACITY_LOSS) * used, 6))


@dataclass
class ClientModel:
    lp: LinearProgram
    document: bytes  # the model document as JSON
    index: dict[str, int]  # variable name -> column
    cuts: CutMaker


def client_model(k: int, rows: int = ROWS) -> ClientModel:
    lp = sized(rows, seed=k)
    lp.name = f"load client {k}"
    return ClientModel(
        lp, orjson.dumps(to_document(lp)), {n: j for j, n in enumerate(lp.col_names)}, CutMaker(lp)
    )
