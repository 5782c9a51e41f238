"""/v1/models: create, read, change by merge patch, list versions, delete. Views stay thin."""

from __future__ import annotations

import hashlib
import json
import math
import time
import zlib
from collections.abc import Callable
from typing import Any

import orjson
from flask import Blueprint, Response, current_app, g, request, url_for

from service.api import jobs
from service.api.auth import authenticate
from service.api.errors import ApiError
from service.api.schemas import CreateQuery, EmptyQuery, IdempotencyKey, ListQuery, ModelQuery, ResultQuery
from service.document import (
    MAX_ERRORS,
    DocumentError,
    FieldError,
    from_document,
    lp_check,
    pointer,
    to_document,
)
from service.operations import ModelService, Outcome, PreconditionFailed, TooMuchContention
from service.serialize import render_result
from service.store import Head, ModelNotFound, op_digest, valid_model_id

bp = Blueprint("models", __name__, url_prefix="/v1")

JSON = "application/json"
MERGE_PATCH = "application/merge-patch+json"
MPS_TYPES = ("text/x-mps",)
GZIP_MAGIC = b"\x1f\x8b"


@bp.before_request
def _authenticate() -> None:
    authenticate(current_app.extensions["hotbasis"].keyring)


def _service() -> ModelService:
    return current_app.extensions["hotbasis"].service


def _timed(name: str, started: float) -> None:
    g.setdefault("timings", {})[name] = g.get("timings", {}).get(name, 0.0) + time.perf_counter() - started


def _json_response(obj: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    t = time.perf_counter()
    body = orjson.dumps(obj)
    _timed("encode", t)
    resp = Response(body, status=status, mimetype=JSON)
    for key, value in (headers or {}).items():
        resp.headers[key] = value
    return resp


def _not_found(model_id: str) -> ApiError:
    return ApiError(404, "model-not-found", "Model not found", f"there is no model {model_id!r} for this key")


def _cold_engine(head: Head) -> str:
    """The engine of the model's cold solves (models stored before the choice existed: the default)."""
    return head.cold_engine or _service().options.engine


def _head(model_id: str) -> Head:
    if not valid_model_id(model_id):
        raise _not_found(model_id)
    try:
        return _service().head(g.tenant, model_id)
    except ModelNotFound:
        raise _not_found(model_id) from None


def _parse_json(data: bytes) -> Any:
    t = time.perf_counter()
    try:
        value = orjson.loads(data)
    except orjson.JSONDecodeError as exc:
        pointers = _non_finite_pointers(data)
        if pointers:  # the usual mistake: a NaN or an Infinity written by a client's JSON encoder
            raise ApiError(
                400,
                "invalid-json",
                "The body is not valid JSON",
                f"{pointers[0] or '/'}: NaN and Infinity are not JSON; every number must be finite",
                errors=[{"pointer": p, "detail": "must be a finite number"} for p in pointers[:MAX_ERRORS]],
            ) from None
        raise ApiError(
            400,
            "invalid-json",
            "The body is not valid JSON",
            f"{exc.msg} at line {exc.lineno} column {exc.colno} (NaN and Infinity are not JSON)",
            errors=[{"pointer": "", "detail": exc.msg}],
        ) from None
    _timed("parse", t)
    return value


def _non_finite_pointers(data: bytes) -> list[str]:
    """Pointers to NaN, Infinity or out-of-range numbers in a body that is JSON but for them.

    The standard library reader accepts those literals (orjson does not); it is
    used only to locate them for the error answer, never to accept a body.
    """
    try:
        value = json.loads(data)
    except (ValueError, RecursionError):
        return []
    found: list[str] = []
    stack: list[tuple[Any, tuple[str, ...]]] = [(value, ())]
    while stack:
        node, path = stack.pop()
        if isinstance(node, float) and not math.isfinite(node):
            found.append(pointer(*path))
        elif isinstance(node, dict):
            stack.extend((v, (*path, str(k))) for k, v in reversed(node.items()))
        elif isinstance(node, list):
            stack.extend((v, (*path, str(i))) for i, v in reversed(list(enumerate(node))))
    return found


def _body() -> bytes:
    data = request.get_data(cache=True)
    limit = request.max_content_length  # the tenant's body limit (service/api/limits.py)
    if limit is not None and request.content_length is None and len(data) >= limit and not g.get("body_ok"):
        # A chunked body (no Content-Length) is cut at the limit without an error by werkzeug;
        # one byte more on the server's stream means the client sent too much.
        if request.environ["wsgi.input"].read(1):
            raise ApiError(
                413, "body-too-large", "Request body too large", f"the body is larger than {limit} bytes"
            )
        g.body_ok = True
    return data


def _require_media(allowed: tuple[str, ...], header: str) -> str:
    mimetype = request.mimetype
    if mimetype not in allowed:
        raise ApiError(
            415,
            "unsupported-media-type",
            "Unsupported media type",
            f"send the body as {' or '.join(allowed)} (got {mimetype or 'no Content-Type'})",
            headers={header: ", ".join(allowed)},
        )
    return mimetype


def _if_match() -> list[str] | None:
    raw = request.headers.get("If-Match")
    if raw is None:
        return None
    tags = [t.strip() for t in raw.split(",") if t.strip()]
    return tags or [""]


def _precondition_failed(exc: PreconditionFailed) -> ApiError:
    head = exc.current
    return ApiError(
        412,
        "stale-version",
        "Precondition failed",
        f"If-Match does not name the current version; the model is at version {head.version}",
        headers={"ETag": head.etag},
        current_version=head.version,
    )


def _result_headers(outcome: Outcome) -> dict[str, str]:
    headers = {"ETag": outcome.head.etag}
    if outcome.replayed:
        headers["Hotbasis-Replayed"] = "true"
    return headers


def _render(outcome: Outcome, query: dict[str, Any]) -> dict[str, Any]:
    return render_result(
        outcome.head.model_id, outcome.record, query["sections"], query["solution"], query["changes_limit"]
    )


# ---------------------------------------------------------------- idempotency


def _with_idempotency(handler: Callable[[str | None, str | None], Response]) -> Response:
    """Run ``handler(op_id, key)`` at most once per (tenant, Idempotency-Key) and replay its answer."""
    raw_key = request.headers.get("Idempotency-Key")
    if raw_key is None:
        return handler(None, None)
    from marshmallow import ValidationError

    try:
        key = IdempotencyKey().load({"key": raw_key})
    except ValidationError:
        raise ApiError(
            400,
            "invalid-header",
            "Invalid Idempotency-Key",
            "an Idempotency-Key is 1 to 255 visible ASCII characters",
            errors=[{"header": "Idempotency-Key", "detail": "1 to 255 visible ASCII characters"}],
        ) from None
    store = _service().store
    digest = hashlib.sha256()
    for part in (request.method, request.full_path, request.mimetype, request.headers.get("If-Match", "")):
        digest.update(part.encode("utf-8", "surrogatepass") + b"\0")
    digest.update(_body())
    fingerprint = digest.hexdigest()
    held = store.idem_begin(g.tenant, key, fingerprint)
    if held is not None:
        if held.get("fingerprint") != fingerprint:
            raise ApiError(
                422,
                "idempotency-key-reused",
                "Idempotency-Key reused",
                "this Idempotency-Key was used for a different request within the last 24 hours",
            )
        if held.get("state") != "done":
            raise ApiError(
                409,
                "request-in-progress",
                "Request in progress",
                "a request with this Idempotency-Key is still being processed",
                headers={"Retry-After": "1"},
            )
        resp = Response(held["body"], status=held["status"], mimetype=JSON)
        for name, value in held.get("headers", {}).items():
            resp.headers[name] = value
        resp.headers["Hotbasis-Replayed"] = "true"
        return resp
    try:
        resp = handler(op_digest(g.tenant, key), key)
    except BaseException:
        store.idem_abort(g.tenant, key)  # nothing was applied; a retry may run it
        raise
    if 200 <= resp.status_code < 300:
        kept = {h: resp.headers[h] for h in ("ETag", "Location", "Preference-Applied") if h in resp.headers}
        store.idem_finish(g.tenant, key, fingerprint, resp.status_code, kept, resp.get_data())
    else:
        store.idem_abort(g.tenant, key)
    return resp


# ---------------------------------------------------------------- models


@bp.post("/models")
def create_model() -> Response:
    query = CreateQuery().load(request.args.to_dict())
    mimetype = _require_media((JSON, *MPS_TYPES), "Accept-Post")

    def work(op_id: str | None, key: str | None) -> Response:
        data = _body()
        if mimetype == JSON:
            doc = _parse_json(data)
            t = time.perf_counter()
            lp = from_document(doc)
        else:
            t = time.perf_counter()
            lp = _read_mps(data)
        _timed("parse", t)
        deferred = jobs.defer_create(lp, doc if mimetype == JSON else None, query, key)
        if deferred is not None:  # Prefer: respond-async, or a model above the size for jobs
            return deferred
        outcome = _service().create(g.tenant, lp, op_id=op_id, idem_key=key, cold_engine=query["cold_engine"])
        _note(outcome)
        headers = _result_headers(outcome)
        headers["Location"] = url_for("models.get_model", model_id=outcome.head.model_id)
        return _json_response(_render(outcome, query), 201, headers)

    return _with_idempotency(work)


def _read_mps(data: bytes):
    from service.lp.mps import MpsError, read_mps

    limit = request.max_content_length or current_app.config["MAX_CONTENT_LENGTH"]
    if data[:2] == GZIP_MAGIC:  # inflate here, with a ceiling, before the reader sees it
        inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
        try:
            data = inflater.decompress(data, limit + 1)
        except zlib.error as exc:
            raise ApiError(
                400, "invalid-mps", "The MPS file cannot be read", f"gzip data is corrupt: {exc}"
            ) from None
        if len(data) > limit:
            raise ApiError(
                413,
                "body-too-large",
                "Request body too large",
                f"the MPS file inflates to more than {limit} bytes",
            )
    try:
        lp = read_mps(bytes(data))
    except MpsError as exc:
        raise ApiError(
            400,
            "invalid-mps",
            "The MPS file cannot be read",
            str(exc),
            errors=[{"pointer": "", "detail": str(exc)}],
        ) from None
    lp_check(lp)
    return lp


@bp.get("/models")
def list_models() -> Response:
    query = ListQuery().load(request.args.to_dict())
    heads, total = _service().store.list_models(g.tenant, query["offset"], query["limit"])
    items = [
        {
            "id": h.model_id,
            "name": h.name,
            "version": h.version,
            "created_at": h.created_at,
            "updated_at": h.updated_at,
            "href": url_for("models.get_model", model_id=h.model_id),
            "cold_engine": _cold_engine(h),
        }
        for h in heads
    ]
    next_offset = query["offset"] + query["limit"]
    nxt = (
        url_for("models.list_models", offset=next_offset, limit=query["limit"])
        if next_offset < total
        else None
    )
    return _json_response(
        {"models": items, "total": total, "offset": query["offset"], "limit": query["limit"], "next": nxt}
    )


@bp.get("/models/<model_id>")
def get_model(model_id: str) -> Response:
    query = ModelQuery().load(request.args.to_dict())
    head = _head(model_id)
    from service.api import toolkit  # imports this module

    if toolkit.wants_mps():  # Accept: text/x-mps: the model as MPS instead of JSON
        return toolkit.mps_response(head, _service().record(head))
    if request.if_none_match and request.if_none_match.contains(head.etag.strip('"')):
        return Response(status=304, headers={"ETag": head.etag})
    t = time.perf_counter()
    rec = _service().record(head)
    _timed("load", t)
    outcome = Outcome(head, rec)
    body: dict[str, Any] = {"id": head.model_id, "version": head.version, "cold_engine": _cold_engine(head)}
    if query["include_model"]:
        body["model"] = to_document(rec.lp)
    body["result"] = _render(outcome, query)
    return _json_response(body, headers={"ETag": head.etag})


@bp.delete("/models/<model_id>")
def delete_model(model_id: str) -> Response:
    EmptyQuery().load(request.args.to_dict())
    head = _head(model_id)
    tags = _if_match()
    if tags is not None and "*" not in tags and head.etag not in tags:
        raise _precondition_failed(PreconditionFailed(head))
    _service().delete(g.tenant, model_id)
    return Response(status=204)


@bp.patch("/models/<model_id>")
def patch_model(model_id: str) -> Response:
    return _patch(model_id, section=None)


@bp.patch("/models/<model_id>/constraints")
def patch_constraints(model_id: str) -> Response:
    return _patch(model_id, section="constraints")


@bp.patch("/models/<model_id>/variables")
def patch_variables(model_id: str) -> Response:
    return _patch(model_id, section="variables")


def _patch(model_id: str, section: str | None) -> Response:
    query = ResultQuery().load(request.args.to_dict())
    _require_media((MERGE_PATCH,), "Accept-Patch")
    head = _head(model_id)  # 404 before anything else is looked at
    if_match = _if_match()

    def work(op_id: str | None, _key: str | None) -> Response:
        patch = _parse_json(_body())
        if section is not None:
            patch = {section: patch}
        try:
            deferred = jobs.defer_patch(head, patch, if_match, query)
            if deferred is not None:  # Prefer: respond-async, or a model above the size for jobs
                return deferred
            outcome = _service().patch(g.tenant, model_id, patch, if_match=if_match, op_id=op_id, head=head)
        except DocumentError as exc:
            if section is not None:  # point into the body that was sent: the map alone
                prefix = "/" + section
                exc.errors = [
                    FieldError(
                        e.pointer[len(prefix) :] if e.pointer.startswith(prefix) else e.pointer, e.detail
                    )
                    for e in exc.errors
                ]
            raise
        except PreconditionFailed as exc:
            raise _precondition_failed(exc) from None
        except ModelNotFound:
            raise _not_found(model_id) from None
        except TooMuchContention:
            raise ApiError(
                503,
                "contention",
                "Too many concurrent changes",
                "the model changed too often while this change was being applied; retry",
                headers={"Retry-After": "1"},
            ) from None
        _note(outcome)
        return _json_response(_render(outcome, query), 200, _result_headers(outcome))

    return _with_idempotency(work)


def _note(outcome: Outcome) -> None:
    """Facts for the access log line and the Server-Timing header."""
    g.model_id = outcome.head.model_id
    g.version = outcome.record.version
    g.solve_method = outcome.record.result["solve"]["method"]
    g.pivots = outcome.record.result["solve"]["pivots"]
    for name, seconds in outcome.timings.items():
        g.setdefault("timings", {})[name] = g.get("timings", {}).get(name, 0.0) + seconds


# ---------------------------------------------------------------- versions


@bp.get("/models/<model_id>/versions")
def list_versions(model_id: str) -> Response:
    EmptyQuery().load(request.args.to_dict())
    head = _head(model_id)
    summaries = _service().store.summaries(head)
    summaries.reverse()  # newest first
    return _json_response(
        {"id": head.model_id, "version": head.version, "versions": summaries}, headers={"ETag": head.etag}
    )


@bp.get("/models/<model_id>/versions/<int:number>")
def get_version(model_id: str, number: int) -> Response:
    query = ModelQuery().load(request.args.to_dict())
    head = _head(model_id)
    if not head.first_version <= number <= head.version:
        raise ApiError(
            404,
            "version-not-found",
            "Version not found",
            f"version {number} is not kept; versions {head.first_version} to {head.version} are",
        )
    try:
        rec = _service().record(head, number)
    except ModelNotFound:  # pruned between the two reads
        raise ApiError(
            404, "version-not-found", "Version not found", f"version {number} is not kept"
        ) from None
    from service.api import toolkit  # imports this module

    if toolkit.wants_mps():  # Accept: text/x-mps: that version's model as MPS, as for the latest
        return toolkit.mps_response(head, rec)
    body: dict[str, Any] = {"id": head.model_id, "version": number, "created_at": rec.created_at}
    if query["include_model"]:
        body["model"] = to_document(rec.lp)
    body["result"] = _render(Outcome(head, rec), query)
    return _json_response(body)
