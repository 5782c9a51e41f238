"""hotbasis LP engine: numbers only (numpy/scipy/highspy), no HTTP, no storage.

Entry points:
- ``solve(lp, options)``: cold solve (HiGHS by default, or the builtin simplex).
- ``reoptimize(lp, basis, options)``: warm re-optimization from a stored basis.
Both return a checked ``SolveResult``.
"""

from threadpoolctl import threadpool_limits

from .basis import Basis, BasisError, Status, remap, slack_basis
from .model import MAXIMIZE, MINIMIZE, LinearProgram, ModelError
from .result import Ranging, SolveOptions, SolveResult

# One BLAS thread: the engine's dense vector work is small, and a threaded BLAS
# on a busy 2-core host spends milliseconds per call synchronizing threads.
# Scale-out comes from processes (gunicorn workers), not BLAS threads.
threadpool_limits(1, user_api="blas")


__all__ = [
    "Basis",
    "BasisError",
    "LinearProgram",
    "MAXIMIZE",
    "MINIMIZE",
    "ModelError",
    "Ranging",
    "SolveOptions",
    "SolveResult",
    "Status",
    "remap",
    "slack_basis",
    "solve",
    "reoptimize",
    "warm_state",
]


def solve(lp, options=None):
    from .engine import solve as _solve

    return _solve(lp, options)


def warm_state(lp, basis, options=None):
    from .engine import warm_state as _warm_state

    return _warm_state(lp, basis, options)


def reoptimize(lp, basis, options=None, **kwargs):
    from .engine import reoptimize as _reoptimize

    return _reoptimize(lp, basis, options, **kwargs)
