"""The Flask application factory."""

from __future__ import annotations

import ctypes
import ctypes.util
import gc
import logging
import os
import re
import time
import uuid
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from flask import Flask, Response, g, request

from service import metrics, plan_json
from service.api import register_blueprints
from service.api.auth import KeyRing, keys_from_env
from service.api.errors import register_error_handlers
from service.cache import VersionCache
from service.limits import LimitBook
from service.logs import configure_logging
from service.lp import kernels
from service.lp.result import SolveOptions
from service.operations import ModelService
from service.store import Store

REQUEST_ID_RE = re.compile(r"^[\x21-\x7e]{1,128}$")
access_log = logging.getLogger("hotbasis.access")


@dataclass
class Services:
    """What the views reach through ``current_app.extensions["hotbasis"]``."""

    service: ModelService
    keyring: KeyRing


def _env_config() -> dict[str, Any]:
    env = os.environ
    return {
        "REDIS_URL": env.get("HOTBASIS_REDIS_URL", "redis://127.0.0.1:6379/0"),
        "REDIS_TIMEOUT": float(env.get("HOTBASIS_REDIS_TIMEOUT", "3")),
        "REDIS_CONNECT_TIMEOUT": float(env.get("HOTBASIS_REDIS_CONNECT_TIMEOUT", "2")),
        "MAX_CONTENT_LENGTH": int(env.get("HOTBASIS_MAX_BODY_BYTES", str(64 * 1024 * 1024))),
        "KEEP_VERSIONS": int(env.get("HOTBASIS_KEEP_VERSIONS", "20")),
        "CACHE_SIZE": int(env.get("HOTBASIS_CACHE_SIZE", "64")),
        "COLD_ENGINE": env.get("HOTBASIS_COLD_ENGINE", "highs"),
        "LOG_LEVEL": env.get("HOTBASIS_LOG_LEVEL", "INFO"),
        "OPENAPI_PATH": env.get(
            "HOTBASIS_OPENAPI", str(Path(__file__).resolve().parent.parent / "openapi.yaml")
        ),
    }


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the service. ``config`` overrides the environment (tests pass REDIS_URL and API_KEYS).

    API_KEYS maps key -> tenant; when absent, keys come from HOTBASIS_API_KEYS
    or the file named by HOTBASIS_API_KEYS_FILE.
    """
    tune_malloc()  # first: before any thread makes its own allocation arena
    app = Flask("hotbasis")
    app.config.update(_env_config())
    app.config.update(config or {})
    configure_logging(app.config["LOG_LEVEL"])
    keys = app.config.get("API_KEYS")
    if keys is None:
        keys = keys_from_env()
    if not keys:
        logging.getLogger("hotbasis").warning("no API keys configured: every /v1 request will be refused")
    store = Store.from_url(
        app.config["REDIS_URL"],
        timeout=app.config["REDIS_TIMEOUT"],
        connect_timeout=app.config["REDIS_CONNECT_TIMEOUT"],
        keep_versions=app.config["KEEP_VERSIONS"],
    )
    limits = app.config.get("LIMITS") or LimitBook.from_env(body_bytes=app.config["MAX_CONTENT_LENGTH"])
    service = ModelService(
        store,
        VersionCache(app.config["CACHE_SIZE"]),
        SolveOptions(engine=app.config["COLD_ENGINE"]),
        limits=limits,
    )
    app.extensions["hotbasis"] = Services(service=service, keyring=KeyRing(keys))
    register_error_handlers(app)
    register_blueprints(app)
    _register_request_hooks(app)
    metrics.init_app(app)
    # compile (first process on the machine) or load the engine's and the plan
    # encoder's compiled loops now, so no request pays for it
    kernels.warm_up()
    plan_json.warm_up()
    _tune_gc()
    return app


def _tune_gc() -> None:
    """Collect reference cycles less often. A PATCH allocates tens of thousands
    of short-lived containers (the plan by name, the change report), which under
    Python's default thresholds (700, 10, 10) set off full collections that walk
    every cached version: measured 25% of a 10,000-row PATCH with the whole
    plan in the answer, 8% of a 2,000-row one. The engine and the service make
    few cycles, so collecting after 50,000 net allocations instead of 700 costs
    little memory; objects alive at start-up are frozen out of the scans."""
    global _GC_TUNED
    if _GC_TUNED:  # once per process (tests build many apps)
        return
    _GC_TUNED = True
    gc.set_threshold(50_000, 20, 100)
    gc.collect()  # nothing collectable goes into the frozen set
    gc.freeze()


_GC_TUNED = False

# glibc's mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD, _M_ARENA_MAX = -1, -3, -8


def tune_malloc() -> bool:
    """Keep freed memory for reuse instead of giving it back to the system
    after every request (glibc only; elsewhere nothing changes).

    A PATCH at 10,000 rows allocates tens of MB in arrays of 0.1-5 MB (the
    plan's JSON pieces, the engine's vectors). With glibc's defaults, blocks
    above the mmap threshold are mapped fresh and the heap's free top is
    trimmed, so each request faults the same pages in again; and a request
    thread gets its own arena, where that happens even after the threshold
    adapts. Measured on the whole plan's JSON at 10,000 rows in a request
    thread: 12-19 ms with the defaults, 6.6-9.8 ms with one arena, a 32 MB
    mmap threshold and a 128 MB trim threshold. The cost: a process keeps up
    to ~128 MB of freed heap. HOTBASIS_MALLOC_TUNING=0 leaves glibc's
    defaults. Returns True when the settings were applied."""
    global _MALLOC_TUNED
    if _MALLOC_TUNED or os.environ.get("HOTBASIS_MALLOC_TUNING", "1") == "0":
        return False
    _MALLOC_TUNED = True
    try:
        mallopt = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").mallopt
    except (OSError, AttributeError):  # no glibc (macOS, ...): its allocator as it is
        return False
    settings = ((_M_ARENA_MAX, 1), (_M_MMAP_THRESHOLD, 32 << 20), (_M_TRIM_THRESHOLD, 128 << 20))
    return all(mallopt(param, value) == 1 for param, value in settings)


_MALLOC_TUNED = False


def _register_request_hooks(app: Flask) -> None:
    @app.before_request
    def start() -> None:
        rid = request.headers.get("X-Request-ID", "")
        g.request_id = rid if REQUEST_ID_RE.match(rid) else uuid.uuid4().hex
        g.started = time.perf_counter()

    @app.after_request
    def finish(resp: Response) -> Response:
        rid = g.get("request_id") or uuid.uuid4().hex
        resp.headers["X-Request-ID"] = rid
        if request.path.startswith("/v1/"):
            resp.headers.setdefault("Cache-Control", "no-store")
        timings = g.get("timings") or {}
        if timings:
            resp.headers["Server-Timing"] = ", ".join(f"{k};dur={v * 1000:.2f}" for k, v in timings.items())
        elapsed = time.perf_counter() - g.get("started", time.perf_counter())
        fields = {
            "method": request.method,
            "path": request.path,
            "status": resp.status_code,
            "duration_ms": round(elapsed * 1000, 2),
        }
        for key in ("tenant", "model_id", "version", "solve_method", "pivots"):
            if g.get(key) is not None:
                fields[key] = g.get(key)
        access_log.info("request", extra=fields)
        return resp
