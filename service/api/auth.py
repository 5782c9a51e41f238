"""Bearer API keys per tenant, compared in constant time."""

from __future__ import annotations

import hashlib
import hmac
import os
import re
from collections.abc import Mapping

from flask import g, request

from service.api import limits
from service.api.errors import ApiError

TENANT_RE = re.compile(r"^[A-Za-z0-9_.-]{1,64}$")
MIN_KEY_LENGTH = 16


def parse_keys(text: str) -> dict[str, str]:
    """``tenant:key`` entries separated by commas or newlines (``#`` starts a comment) -> {key: tenant}."""
    out: dict[str, str] = {}
    for raw in re.split(r"[,\n]", text):
        entry = raw.split("#", 1)[0].strip()
        if not entry:
            continue
        tenant, sep, key = entry.partition(":")
        tenant, key = tenant.strip(), key.strip()
        if not sep or not TENANT_RE.match(tenant):
            raise ValueError("API keys must be given as tenant:key with a tenant of letters, digits, _ . -")
        if len(key) < MIN_KEY_LENGTH:
            raise ValueError(f"the API key of tenant {tenant!r} is shorter than {MIN_KEY_LENGTH} characters")
        out[key] = tenant
    return out


def keys_from_env(environ: Mapping[str, str] = os.environ) -> dict[str, str]:
    """Keys from HOTBASIS_API_KEYS, then from the file named by HOTBASIS_API_KEYS_FILE."""
    keys = parse_keys(environ.get("HOTBASIS_API_KEYS", ""))
    path = environ.get("HOTBASIS_API_KEYS_FILE")
    if path:
        with open(path, encoding="utf-8") as fh:
            keys.update(parse_keys(fh.read()))
    return keys


class KeyRing:
    """Finds the tenant of a presented key without an early exit on the first match."""

    def __init__(self, keys: Mapping[str, str]) -> None:
        for tenant in keys.values():
            if not TENANT_RE.match(tenant):
                raise ValueError(f"invalid tenant name {tenant!r}")
        self._entries = [(hashlib.sha256(k.encode()).digest(), t) for k, t in keys.items()]

    def tenant_for(self, presented: str) -> str | None:
        digest = hashlib.sha256(presented.encode("utf-8", "surrogatepass")).digest()
        found = None
        for known, tenant in self._entries:  # every entry is compared: the time does not tell which matched
            if hmac.compare_digest(digest, known):
                found = tenant
        return found


def authenticate(ring: KeyRing) -> str:
    """The caller's tenant from ``Authorization: Bearer <key>``; 401 otherwise."""
    header = request.headers.get("Authorization", "")
    scheme, _, token = header.partition(" ")
    if not header or scheme.lower() != "bearer" or not token.strip():
        raise ApiError(
            401,
            "unauthorized",
            "Authentication required",
            "send the API key as Authorization: Bearer <key>",
            headers={"WWW-Authenticate": 'Bearer realm="hotbasis"'},
        )
    tenant = ring.tenant_for(token.strip())
    if tenant is None:
        raise ApiError(
            401,
            "unauthorized",
            "Authentication required",
            "the API key is not known",
            headers={"WWW-Authenticate": 'Bearer realm="hotbasis", error="invalid_token"'},
        )
    g.tenant = tenant
    limits.enforce(tenant)  # body size and rate, per tenant
    return tenant
