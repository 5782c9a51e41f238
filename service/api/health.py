"""Liveness, readiness and the API description (no authentication)."""

from __future__ import annotations

from pathlib import Path

import orjson
from flask import Blueprint, Response, current_app

from service.api.errors import ApiError

bp = Blueprint("health", __name__)


@bp.get("/healthz")
def healthz() -> Response:
    return Response(orjson.dumps({"status": "ok"}), mimetype="application/json")


@bp.get("/readyz")
def readyz() -> Response:
    try:
        current_app.extensions["hotbasis"].service.store.ping()
    except Exception as exc:  # any failure to reach Redis means "not ready"
        raise ApiError(
            503,
            "not-ready",
            "Not ready",
            f"the model store does not answer: {type(exc).__name__}",
            headers={"Retry-After": "2"},
        ) from None
    return Response(orjson.dumps({"status": "ready"}), mimetype="application/json")


@bp.get("/openapi.yaml")
def openapi() -> Response:
    path = Path(current_app.config["OPENAPI_PATH"])
    return Response(path.read_bytes(), mimetype="application/yaml")
