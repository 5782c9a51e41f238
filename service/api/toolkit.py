"""The planner's toolkit over HTTP: why a version is infeasible, ranging, revert, MPS export.

- ``GET /v1/models/{id}/conflict``: an irreducible infeasible subset of bounds, by name and side.
- ``GET /v1/models/{id}/sensitivity``: cost ranges per variable, right-hand-side ranges per constraint.
- ``POST /v1/models/{id}/versions/{n}/restore``: a new version equal to version n, re-optimized warm.
- ``GET /v1/models/{id}`` with ``Accept: text/x-mps``: the model as free-format MPS (see ``mps_response``).

Conflicts and ranges are computed on demand from the stored version (model, basis, plan) and kept in
a small per-process cache keyed by (model, version), the model named by id and creation time
(``operations.cache_id``): versions never change, and a model created again under its id is another.
"""

from __future__ import annotations

import math
import threading
import time
from collections import OrderedDict
from typing import Any

import numpy as np
from flask import Blueprint, Response, current_app, g, request
from marshmallow import RAISE, Schema, fields, validate

from service.api.auth import authenticate
from service.api.errors import ApiError
from service.api.models import (
    _head,
    _if_match,
    _json_response,
    _note,
    _precondition_failed,
    _render,
    _result_headers,
    _service,
    _timed,
    _with_idempotency,
)
from service.api.schemas import ResultQuery
from service.lp.conflict import NotInfeasible, find_conflict
from service.lp.mps import write_mps
from service.lp.ranging import compute_ranging
from service.operations import PreconditionFailed, TooMuchContention, cache_id
from service.store import Head, ModelNotFound, VersionRecord

bp = Blueprint("toolkit", __name__, url_prefix="/v1")

MPS = "text/x-mps"
JSON = "application/json"
CACHE_SIZE = 64


class VersionQuery(Schema):
    """``?version=n`` (default: the current version)."""

    class Meta:
        unknown = RAISE

    version = fields.Integer(validate=validate.Range(min=1), load_default=None)


class _Answers:
    """A small LRU of computed answers keyed by (operations.cache_id, version, kind); thread-safe."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._items: OrderedDict[tuple[str, int, str], dict[str, Any]] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: tuple[str, int, str]) -> dict[str, Any] | None:
        with self._lock:
            value = self._items.get(key)
            if value is not None:
                self._items.move_to_end(key)
            return value

    def put(self, key: tuple[str, int, str], value: dict[str, Any]) -> None:
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.size:
                self._items.popitem(last=False)


ANSWERS = _Answers(CACHE_SIZE)


@bp.before_request
def _authenticate() -> None:
    authenticate(current_app.extensions["hotbasis"].keyring)


def _version_not_kept(head: Head, number: int) -> ApiError:
    return ApiError(
        404,
        "version-not-found",
        "Version not found",
        f"version {number} is not kept; versions {head.first_version} to {head.version} are",
    )


def _load(model_id: str, number: int | None) -> tuple[Head, VersionRecord]:
    head = _head(model_id)
    number = head.version if number is None else number
    if not head.first_version <= number <= head.version:
        raise _version_not_kept(head, number)
    t = time.perf_counter()
    try:
        rec = _service().record(head, number)
    except ModelNotFound:  # pruned between the two reads
        raise _version_not_kept(head, number) from None
    _timed("load", t)
    g.model_id, g.version = head.model_id, number
    return head, rec


def _wrong_status(rec: VersionRecord, wanted: str, what: str) -> ApiError:
    status = rec.result["status"]
    return ApiError(
        409,
        "wrong-status",
        f"The version is not {wanted}",
        f"version {rec.version} is {status}; {what} needs an {wanted} version",
        status_of_version=status,
    )


def _finite(values: np.ndarray) -> list[float | None]:
    """Numbers for JSON: +-inf (an unbounded end) and NaN become null; -0.0 and noise become 0."""
    v = np.where(np.abs(values) < 1e-12, 0.0, values) + 0.0
    return [x if math.isfinite(x) else None for x in v.tolist()]


# ---------------------------------------------------------------- conflict


@bp.get("/models/<model_id>/conflict")
def conflict(model_id: str) -> Response:
    query = VersionQuery().load(request.args.to_dict())
    head, rec = _load(model_id, query["version"])
    if rec.result["status"] != "infeasible":
        raise _wrong_status(rec, "infeasible", "a conflict")
    key = (cache_id(head), rec.version, "conflict")
    body = ANSWERS.get(key)
    if body is None:
        body = conflict_json(head.model_id, rec, _service().options)
        ANSWERS.put(key, body)
    return _json_response(body)


def conflict_json(model_id: str, rec: VersionRecord, options: Any) -> dict[str, Any]:
    """The irreducible infeasible subset of a stored infeasible version, by name and side."""
    lp = rec.lp
    named = (rec.result.get("certificate") or {}).get("farkas")
    farkas = None
    if named:  # the stored certificate, back to row order; the engine checks it before use
        index = {name: i for i, name in enumerate(lp.row_names)}
        farkas = np.zeros(lp.m)
        for name, value in named.items():
            if name in index:
                farkas[index[name]] = value
    try:
        found = find_conflict(lp, farkas, options)
    except NotInfeasible as exc:
        raise ApiError(409, "not-infeasible", "The version is not infeasible", str(exc)) from None
    members = [
        {m.kind: m.name, "side": m.side, "bound": m.bound if math.isfinite(m.bound) else None}
        for m in found.members
    ]
    return {
        "id": model_id,
        "version": rec.version,
        "status": "infeasible",
        "members": members,
        "size": len(members),
        "started_from": found.started_from,
        "solves": found.solves,
        "pivots": found.pivots,
        "time_ms": round(found.seconds * 1000.0, 3),
        "notes": list(found.notes),
    }


# ---------------------------------------------------------------- sensitivity


@bp.get("/models/<model_id>/sensitivity")
def sensitivity(model_id: str) -> Response:
    query = VersionQuery().load(request.args.to_dict())
    head, rec = _load(model_id, query["version"])
    sol = rec.solution
    if (
        rec.result["status"] != "optimal"
        or rec.basis is None
        or sol.x is None
        or sol.shadow_price is None
        or sol.reduced_cost is None
    ):
        raise _wrong_status(rec, "optimal", "ranging")
    key = (cache_id(head), rec.version, "sensitivity")
    body = ANSWERS.get(key)
    if body is None:
        body = sensitivity_json(head.model_id, rec)
        ANSWERS.put(key, body)
    return _json_response(body)


def sensitivity_json(model_id: str, rec: VersionRecord) -> dict[str, Any]:
    """Cost and right-hand-side ranges at the version's optimal basis, in the user's names and sense."""
    lp, sol = rec.lp, rec.solution
    started = time.perf_counter()
    rg = compute_ranging(lp, rec.basis, sol.x, sol.shadow_price, sol.reduced_cost)
    seconds = time.perf_counter() - started
    cost, value = _finite(lp.c), _finite(sol.x)
    c_lo, c_up = _finite(rg.cost_lower), _finite(rg.cost_upper)
    activity, price = _finite(sol.row_activity), _finite(sol.shadow_price)
    r_lo, r_up = _finite(rg.rhs_lower), _finite(rg.rhs_upper)
    variables = {
        name: {"cost": cost[j], "value": value[j], "cost_lower": c_lo[j], "cost_upper": c_up[j]}
        for j, name in enumerate(lp.col_names)
    }
    constraints = {
        name: {"activity": activity[i], "shadow_price": price[i], "rhs_lower": r_lo[i], "rhs_upper": r_up[i]}
        for i, name in enumerate(lp.row_names)
    }
    return {
        "id": model_id,
        "version": rec.version,
        "sense": "max" if lp.sense == -1 else "min",
        "objective": rec.result["objective"],
        "variables": variables,
        "constraints": constraints,
        "time_ms": round(seconds * 1000.0, 3),
    }


# ---------------------------------------------------------------- restore


@bp.post("/models/<model_id>/versions/<int:number>/restore")
def restore(model_id: str, number: int) -> Response:
    query = ResultQuery().load(request.args.to_dict())
    head = _head(model_id)  # 404 before anything else is looked at
    if not head.first_version <= number <= head.version:
        raise _version_not_kept(head, number)
    if_match = _if_match()

    def work(op_id: str | None, _key: str | None) -> Response:
        try:
            outcome = _service().restore(g.tenant, model_id, number, if_match=if_match, op_id=op_id)
        except PreconditionFailed as exc:
            raise _precondition_failed(exc) from None
        except ModelNotFound:  # the version was pruned meanwhile, or the model deleted
            raise _version_not_kept(_head(model_id), number) from None
        except TooMuchContention:
            raise ApiError(
                503,
                "contention",
                "Too many concurrent changes",
                "the model changed too often while the version was being restored; retry",
                headers={"Retry-After": "1"},
            ) from None
        _note(outcome)
        return _json_response(_render(outcome, query), 200, _result_headers(outcome))

    return _with_idempotency(work)


# ---------------------------------------------------------------- MPS export


def wants_mps() -> bool:
    """The client prefers MPS to JSON (``Accept: text/x-mps``); JSON stays the default."""
    accept = request.accept_mimetypes
    return accept.best_match([JSON, MPS]) == MPS and accept[MPS] > accept[JSON]


def mps_response(head: Head, rec: VersionRecord) -> Response:
    """The version's model as free-format MPS text (names free MPS cannot hold: see service.lp.mps)."""
    etag = f'"v{rec.version}-mps"'  # a representation of its own, so its own validator
    if request.if_none_match and request.if_none_match.contains(etag.strip('"')):
        return Response(status=304, headers={"ETag": etag, "Vary": "Accept"})
    t = time.perf_counter()
    text = write_mps(rec.lp)
    _timed("encode", t)
    resp = Response(text.encode("utf-8"), status=200, mimetype=MPS)
    resp.headers["ETag"] = etag
    resp.headers["Vary"] = "Accept"
    resp.headers["Content-Disposition"] = f'inline; filename="{head.model_id}-v{rec.version}.mps"'
    return resp
