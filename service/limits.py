"""Per-tenant limits: body size, model size, requests per second. Plain values; no Flask.

Defaults come from the environment (HOTBASIS_LIMIT_*), overrides per tenant
from HOTBASIS_TENANT_LIMITS, e.g. ``acme:rate=20;burst=40;rows=50000,globex:body_bytes=1048576``.
A limit of 0 means "no limit" for rate and model sizes.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, fields, replace

from service.lp.model import LinearProgram


@dataclass(frozen=True)
class Limits:
    body_bytes: int = 64 * 1024 * 1024  # request body (after gzip, for MPS uploads)
    rows: int = 200_000  # constraints per model
    columns: int = 1_000_000  # variables per model
    nonzeros: int = 5_000_000  # constraint coefficients per model
    # requests per second, sustained (token bucket refill): above what one tenant's changes can
    # keep a few cores busy with (a 2,000-row change costs ~15-50 ms of a core), so the default
    # guards against runaway clients without throttling a busy tenant; set it lower per tenant
    # for fairness between tenants
    rate: float = 500.0
    burst: int = 1000  # requests that may arrive at once (bucket size)


ENV_NAMES = {
    "body_bytes": "HOTBASIS_LIMIT_BODY_BYTES",
    "rows": "HOTBASIS_LIMIT_ROWS",
    "columns": "HOTBASIS_LIMIT_COLUMNS",
    "nonzeros": "HOTBASIS_LIMIT_NONZEROS",
    "rate": "HOTBASIS_LIMIT_RATE",
    "burst": "HOTBASIS_LIMIT_BURST",
}


class ModelTooLarge(Exception):
    """A model (created, or after a patch) is above the tenant's size limits."""

    def __init__(self, what: str, size: int, limit: int) -> None:
        super().__init__(f"the model has {size} {what}; the limit for this API key is {limit}")
        self.what, self.size, self.limit = what, size, limit


def _coerce(name: str, text: str) -> int | float:
    value = float(text) if name == "rate" else int(text)
    if value < 0:
        raise ValueError(f"limit {name} must not be negative")
    return value


def parse_overrides(text: str) -> dict[str, dict[str, int | float]]:
    """``tenant:key=value;key=value`` entries separated by commas or newlines -> {tenant: {key: value}}."""
    names = {f.name for f in fields(Limits)}
    out: dict[str, dict[str, int | float]] = {}
    for raw in text.replace("\n", ",").split(","):
        entry = raw.split("#", 1)[0].strip()
        if not entry:
            continue
        tenant, sep, rest = entry.partition(":")
        if not sep or not tenant.strip():
            raise ValueError(f"tenant limits are given as tenant:key=value;key=value (got {entry!r})")
        values = out.setdefault(tenant.strip(), {})
        for item in rest.split(";"):
            if not item.strip():
                continue
            key, eq, value = item.partition("=")
            key = key.strip()
            if not eq or key not in names:
                raise ValueError(f"unknown tenant limit {key!r}; known: {', '.join(sorted(names))}")
            values[key] = _coerce(key, value.strip())
    return out


class LimitBook:
    """The limits of every tenant: defaults plus overrides."""

    def __init__(self, default: Limits, overrides: Mapping[str, Mapping[str, int | float]] | None = None):
        self.default = default
        self._by_tenant = {t: replace(default, **v) for t, v in (overrides or {}).items()}

    def __call__(self, tenant: str) -> Limits:
        return self._by_tenant.get(tenant, self.default)

    @classmethod
    def from_env(cls, environ: Mapping[str, str] = os.environ, body_bytes: int | None = None) -> LimitBook:
        values: dict[str, int | float] = {}
        if body_bytes is not None:
            values["body_bytes"] = body_bytes
        for name, var in ENV_NAMES.items():
            if environ.get(var):
                values[name] = _coerce(name, environ[var])
        return cls(Limits(**values), parse_overrides(environ.get("HOTBASIS_TENANT_LIMITS", "")))


def check_model(lp: LinearProgram, limits: Limits) -> None:
    """Raise ModelTooLarge when ``lp`` is above the limits (0 = no limit)."""
    for what, size, limit in (
        ("constraints", lp.m, limits.rows),
        ("variables", lp.n, limits.columns),
        ("constraint coefficients", int(lp.A.nnz), limits.nonzeros),
    ):
        if limit and size > limit:
            raise ModelTooLarge(what, size, limit)
