"""Where the shared Netlib LP problems live, and their published optima.

Source of the figures: shared/data/netlib/optimal.csv (the Netlib LP
collection's published table of optimal values; rows exclude the objective
row). The directory sits beside the repository (``<repo>/../shared``); the
environment variable HOTBASIS_NETLIB_DIR overrides it.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass
from pathlib import Path

REPO_ROOT = Path(__file__).resolve().parents[2]


@dataclass(frozen=True)
class NetlibProblem:
    name: str
    rows: int
    columns: int
    optimum: float
    path: Path


def netlib_dir() -> Path:
    override = os.environ.get("HOTBASIS_NETLIB_DIR")
    return Path(override) if override else REPO_ROOT.parent / "shared" / "data" / "netlib"


def netlib_problems() -> list[NetlibProblem]:
    """Every problem listed in optimal.csv, in file order; [] when the data is absent."""
    base = netlib_dir()
    table = base / "optimal.csv"
    if not table.is_file():
        return []
    with table.open(newline="") as fh:
        return [
            NetlibProblem(
                name=row["name"],
                rows=int(row["rows"]),
                columns=int(row["columns"]),
                optimum=float(row["optimal_objective"]),
                path=base / f"{row['name']}.mps.gz",
            )
            for row in csv.DictReader(fh)
        ]


def netlib_problem(name: str) -> NetlibProblem:
    for prob in netlib_problems():
        if prob.name == name:
            return prob
    raise KeyError(f"Netlib problem {name!r} not found in {netlib_dir()}")
