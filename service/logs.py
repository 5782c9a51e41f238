"""JSON-lines logging with the request id of the request being served."""

from __future__ import annotations

import logging
import sys
import time
import traceback

import orjson

_RESERVED = set(vars(logging.LogRecord("", 0, "", 0, "", None, None))) | {"message", "asctime"}


class JsonFormatter(logging.Formatter):
    """One JSON object per line: time, level, logger, message, request id and any extra fields."""

    def format(self, record: logging.LogRecord) -> str:
        out = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": record.getMessage(),
        }
        request_id = _request_id()
        if request_id:
            out["request_id"] = request_id
        for key, value in vars(record).items():
            if key not in _RESERVED and not key.startswith("_"):
                out[key] = value
        if record.exc_info:
            out["error"] = "".join(traceback.format_exception(*record.exc_info)).strip()
        return orjson.dumps(out, default=str).decode()


def _request_id() -> str | None:
    try:
        from flask import g, has_request_context

        if has_request_context():
            return g.get("request_id")
    except ImportError:  # logging outside Flask (scripts, workers)
        pass
    return None


def configure_logging(level: str = "INFO") -> None:
    """Send the service's loggers to stderr as JSON lines (once per process)."""
    root = logging.getLogger("hotbasis")
    if any(getattr(h, "_hotbasis", False) for h in root.handlers):
        root.setLevel(level.upper())
        return
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    handler._hotbasis = True  # type: ignore[attr-defined]
    root.addHandler(handler)
    root.setLevel(level.upper())
    root.propagate = False
