"""Per-tenant request limits at the door: body size (413) and requests per second (429)."""

from __future__ import annotations

import math

from flask import current_app, request

from service.api.errors import ApiError


def enforce(tenant: str) -> None:
    """Apply ``tenant``'s body size and rate limits to the current request."""
    services = current_app.extensions["hotbasis"]
    limits = services.service.limits(tenant)
    ceiling = current_app.config.get("MAX_CONTENT_LENGTH")
    cap = limits.body_bytes if ceiling is None else min(limits.body_bytes, ceiling)
    request.max_content_length = cap  # chunked bodies are cut here too; the views check for more
    if request.content_length is not None and request.content_length > cap:
        raise ApiError(
            413,
            "body-too-large",
            "Request body too large",
            f"the body is {request.content_length} bytes; the limit for this API key is {cap} bytes",
            limit=cap,
        )
    if limits.rate > 0:
        allowed, wait = services.service.store.take_token(tenant, limits.rate, limits.burst)
        if not allowed:
            retry = max(1, math.ceil(wait))
            raise ApiError(
                429,
                "too-many-requests",
                "Too many requests",
                f"this API key may send {limits.rate:g} requests per second (bursts of {limits.burst}); "
                f"retry after {retry} s",
                headers={"Retry-After": str(retry)},
            )
