"""RFC 9457 problem details: one error type, one handler, every error answered the same way."""

from __future__ import annotations

import logging
from typing import Any

import orjson
import redis
from flask import Flask, Response, g, request
from marshmallow import ValidationError
from werkzeug.exceptions import HTTPException

from service.document import DocumentError
from service.limits import ModelTooLarge

PROBLEM_BASE = "urn:hotbasis:problem:"
PROBLEM_JSON = "application/problem+json"
log = logging.getLogger("hotbasis.api")

_HTTP_SLUGS = {
    400: ("bad-request", "Bad request"),
    401: ("unauthorized", "Authentication required"),
    403: ("forbidden", "Forbidden"),
    404: ("not-found", "Not found"),
    405: ("method-not-allowed", "Method not allowed"),
    406: ("not-acceptable", "Not acceptable"),
    409: ("conflict", "Conflict"),
    412: ("precondition-failed", "Precondition failed"),
    413: ("body-too-large", "Request body too large"),
    415: ("unsupported-media-type", "Unsupported media type"),
    422: ("unprocessable", "Unprocessable request"),
    428: ("precondition-required", "Precondition required"),
    429: ("too-many-requests", "Too many requests"),
    500: ("internal-error", "Internal error"),
    503: ("unavailable", "Service unavailable"),
}


# Redis unreachable, too slow, still loading its data, or (cluster, sentinel) between primaries:
# the request changed nothing it can vouch for, and a retry after a short wait may succeed.
STORAGE_DOWN = (
    redis.ConnectionError,
    redis.TimeoutError,
    redis.BusyLoadingError,
    redis.exceptions.ClusterDownError,
    redis.exceptions.TryAgainError,
    redis.exceptions.SlotNotCoveredError,
    redis.exceptions.MasterDownError,
    redis.exceptions.ReadOnlyError,
)


class ApiError(Exception):
    """An error answer: status, a problem type slug, a title, a detail and optional field errors."""

    def __init__(
        self,
        status: int,
        slug: str,
        title: str,
        detail: str = "",
        errors: list[dict[str, str]] | None = None,
        headers: dict[str, str] | None = None,
        **extra: Any,
    ) -> None:
        super().__init__(detail or title)
        self.status = status
        self.slug = slug
        self.title = title
        self.detail = detail
        self.errors = errors
        self.headers = headers or {}
        self.extra = extra


def problem_response(err: ApiError) -> Response:
    body: dict[str, Any] = {
        "type": PROBLEM_BASE + err.slug,
        "title": err.title,
        "status": err.status,
        "detail": err.detail or err.title,
        "instance": request.path,
    }
    if err.errors:
        body["errors"] = err.errors
    rid = g.get("request_id")
    if rid:
        body["request_id"] = rid
    body.update(err.extra)
    resp = Response(orjson.dumps(body), status=err.status, mimetype=PROBLEM_JSON)
    for key, value in err.headers.items():
        resp.headers[key] = value
    return resp


def _from_http(exc: HTTPException) -> ApiError:
    code = exc.code or 500
    slug, title = _HTTP_SLUGS.get(code, ("http-error", exc.name or "HTTP error"))
    headers = {}
    if code == 405 and getattr(exc, "valid_methods", None):
        headers["Allow"] = ", ".join(sorted(exc.valid_methods))
    detail = exc.description or title
    if code == 404:
        detail = f"there is no resource at {request.path}"
    return ApiError(code, slug, title, detail, headers=headers)


def register_error_handlers(app: Flask) -> None:
    @app.errorhandler(Exception)
    def handle(exc: Exception) -> Response:
        if isinstance(exc, ApiError):
            return problem_response(exc)
        if isinstance(exc, DocumentError):
            return problem_response(
                ApiError(
                    400, "invalid-document", exc.title, str(exc), errors=[e.as_dict() for e in exc.errors]
                )
            )
        if isinstance(exc, ModelTooLarge):
            return problem_response(
                ApiError(413, "model-too-large", "Model too large", str(exc), limit=exc.limit, size=exc.size)
            )
        if isinstance(exc, ValidationError):
            return problem_response(query_error(exc))
        if isinstance(exc, HTTPException):
            return problem_response(_from_http(exc))
        if isinstance(exc, STORAGE_DOWN):
            log.warning("storage unavailable: %s", exc)
            return problem_response(
                ApiError(
                    503,
                    "storage-unavailable",
                    "Storage unavailable",
                    "the model store cannot be reached; retry shortly",
                    headers={"Retry-After": "2"},
                )
            )
        log.exception("unhandled error")
        return problem_response(
            ApiError(
                500,
                "internal-error",
                "Internal error",
                "the service failed on this request; it is logged under the request id",
            )
        )


def query_error(exc: ValidationError) -> ApiError:
    """Marshmallow messages on query parameters as problem field errors."""
    errors = []
    messages = exc.messages if isinstance(exc.messages, dict) else {"": exc.messages}
    for name, msgs in messages.items():
        for msg in msgs if isinstance(msgs, list) else [msgs]:
            errors.append({"parameter": str(name), "detail": str(msg)})
    return ApiError(
        400, "invalid-parameter", "Invalid query parameter", "a query parameter is not valid", errors=errors
    )
