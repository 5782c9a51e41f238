"""Per-tenant limits: body size (413), model size (413), requests per second (429 with Retry-After)."""

from __future__ import annotations

import time

import orjson
import pytest
from conftest import TENANT_KEYS, auth, juice_network, snapshot

from service.app import create_app
from service.limits import LimitBook, Limits, parse_overrides

MERGE = "application/merge-patch+json"
PROBLEM = "application/problem+json"


def limited_app(redis_url, **overrides):
    book = LimitBook(Limits(rate=0), overrides)  # rate 0: no rate limit unless a tenant sets one
    keys = {key: tenant for tenant, key in TENANT_KEYS.items()}
    return create_app({"TESTING": True, "REDIS_URL": redis_url, "API_KEYS": keys, "LIMITS": book})


def test_overrides_parse_and_reject_unknown_names():
    parsed = parse_overrides("acme:rate=2.5;burst=4, globex:rows=10 # small tenant\n")
    assert parsed == {"acme": {"rate": 2.5, "burst": 4}, "globex": {"rows": 10}}
    with pytest.raises(ValueError):
        parse_overrides("acme:speed=3")
    book = LimitBook.from_env({"HOTBASIS_LIMIT_ROWS": "7", "HOTBASIS_TENANT_LIMITS": "acme:rows=9"})
    assert book("acme").rows == 9 and book("globex").rows == 7 and book("globex").rate == Limits().rate


def test_body_size_per_tenant(redis_url, rclient):
    body = orjson.dumps(juice_network())
    client = limited_app(redis_url, globex={"body_bytes": len(body) - 1}).test_client()
    before = snapshot(rclient)
    resp = client.post("/v1/models", data=body, content_type="application/json", headers=auth("globex"))
    assert resp.status_code == 413 and resp.mimetype == PROBLEM
    problem = resp.get_json()
    assert problem["type"] == "urn:hotbasis:problem:body-too-large" and problem["limit"] == len(body) - 1
    assert snapshot(rclient) == before
    ok = client.post("/v1/models", data=body, content_type="application/json", headers=auth("acme"))
    assert ok.status_code == 201  # another tenant's limit is the default


def test_model_size_on_create_and_after_a_patch(redis_url, rclient):
    # juice_network: 6 variables, 5 constraints, 12 coefficients
    client = limited_app(
        redis_url, acme={"rows": 5, "columns": 6, "nonzeros": 13}, globex={"nonzeros": 11}
    ).test_client()
    refused = client.post("/v1/models", json=juice_network(), headers=auth("globex"))
    assert refused.status_code == 413 and refused.mimetype == PROBLEM
    problem = refused.get_json()
    assert problem["type"] == "urn:hotbasis:problem:model-too-large"
    assert problem["detail"] == "the model has 12 constraint coefficients; the limit for this API key is 11"
    created = client.post("/v1/models", json=juice_network(), headers=auth("acme"))
    assert created.status_code == 201
    mid = created.get_json()["id"]
    before = snapshot(rclient)
    row = {"constraints": {"audit": {"terms": {"ship_press_north_cafe_a": 1}, "upper": 50}}}
    resp = client.patch(f"/v1/models/{mid}", json=row, headers={**auth("acme"), "Content-Type": MERGE})
    assert resp.status_code == 413
    assert resp.get_json()["detail"] == "the model has 6 constraints; the limit for this API key is 5"
    assert snapshot(rclient) == before  # nothing stored
    col = {"variables": {"ship_spare": {"cost": 1}}}
    resp = client.patch(f"/v1/models/{mid}", json=col, headers={**auth("acme"), "Content-Type": MERGE})
    assert resp.status_code == 413 and "7 variables" in resp.get_json()["detail"]
    bound = {"constraints": {"demand_cafe_a": {"lower": 31}}}  # same size: accepted
    resp = client.patch(f"/v1/models/{mid}", json=bound, headers={**auth("acme"), "Content-Type": MERGE})
    assert resp.status_code == 200 and resp.get_json()["version"] == 2


def test_requests_per_second_shared_by_workers(redis_url):
    # two app instances stand for two gunicorn workers: the bucket lives in Redis, so they share it
    first = limited_app(redis_url, acme={"rate": 2, "burst": 3}).test_client()
    second = limited_app(redis_url, acme={"rate": 2, "burst": 3}).test_client()
    codes = [c.get("/v1/models", headers=auth()).status_code for c in (first, second, first)]
    assert codes == [200, 200, 200]
    resp = second.get("/v1/models", headers=auth())
    assert resp.status_code == 429 and resp.mimetype == PROBLEM
    assert resp.get_json()["type"] == "urn:hotbasis:problem:too-many-requests"
    retry = int(resp.headers["Retry-After"])
    assert retry == 1  # one token comes back in 0.5 s at 2 per second; Retry-After is whole seconds
    assert first.get("/v1/models", headers=auth("globex")).status_code == 200  # other tenants unaffected
    time.sleep(retry)
    assert first.get("/v1/models", headers=auth()).status_code == 200
    # health checks are not rate limited
    assert all(second.get("/healthz").status_code == 200 for _ in range(5))
