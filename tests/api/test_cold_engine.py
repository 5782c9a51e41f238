"""The cold engine chosen per model: ?cold_engine=builtin on create, kept for later cold re-solves."""

from __future__ import annotations

import pytest
from conftest import TENANT_KEYS, auth, juice_network, reference_objective

from service.app import create_app

from .test_models import netlib_dir, netlib_optimum

MERGE = "application/merge-patch+json"


@pytest.mark.parametrize("name", ["afiro", "sc105"])
def test_mps_upload_solved_cold_by_the_builtin_engine(client, name):
    data = (netlib_dir() / f"{name}.mps.gz").read_bytes()
    resp = client.post(
        "/v1/models?cold_engine=builtin&solution=none", data=data, content_type="text/x-mps", headers=auth()
    )
    assert resp.status_code == 201, resp.get_json()
    body = resp.get_json()
    assert body["solve"]["method"] == "cold_builtin" and body["solve"]["cold_engine"] == "builtin"
    assert body["solve"]["fallback"] is None and body["solve"]["check"]["passed"] is True
    # Netlib published optimum, shared/data/netlib/optimal.csv
    assert body["objective"] == pytest.approx(netlib_optimum(name), rel=1e-8)
    shown = client.get(f"/v1/models/{body['id']}?model=false&fields=solve", headers=auth()).get_json()
    assert shown["cold_engine"] == "builtin" and shown["result"]["solve"]["method"] == "cold_builtin"
    listed = client.get("/v1/models", headers=auth()).get_json()["models"]
    assert [m["cold_engine"] for m in listed] == ["builtin"]


def test_default_is_highs_and_warm_changes_use_the_builtin_simplex(client):
    resp = client.post("/v1/models", json=juice_network(), headers=auth())
    assert resp.get_json()["solve"]["method"] == "cold_highs"
    assert resp.get_json()["solve"]["cold_engine"] == "highs"
    mid = resp.get_json()["id"]
    assert client.get(f"/v1/models/{mid}", headers=auth()).get_json()["cold_engine"] == "highs"
    cut = {"constraints": {"north_cap": {"terms": {"ship_press_north_cafe_a": 1}, "upper": 10}}}
    warm = client.patch(f"/v1/models/{mid}", json=cut, headers={**auth(), "Content-Type": MERGE}).get_json()
    assert warm["solve"]["warm"] is True and warm["solve"]["method"] in {"dual", "dual+primal"}
    bad = client.post("/v1/models?cold_engine=simplex9", json=juice_network(), headers=auth())
    assert bad.status_code == 400 and bad.get_json()["errors"][0]["parameter"] == "cold_engine"


def test_a_later_cold_re_solve_uses_the_models_engine(redis_url, rclient):
    keys = {key: tenant for tenant, key in TENANT_KEYS.items()}
    client = create_app({"TESTING": True, "REDIS_URL": redis_url, "API_KEYS": keys}).test_client()
    resp = client.post("/v1/models?cold_engine=builtin", json=juice_network(), headers=auth())
    mid = resp.get_json()["id"]
    assert resp.get_json()["solve"]["method"] == "cold_builtin"
    # a version stored without a basis (as by an older release): the next change must solve cold
    assert rclient.hdel(f"{{hb:{mid}}}:v:1", "basis") == 1
    fresh = create_app({"TESTING": True, "REDIS_URL": redis_url, "API_KEYS": keys}).test_client()
    change = {"constraints": {"demand_market": {"lower": 50}}}
    resp = fresh.patch(f"/v1/models/{mid}", json=change, headers={**auth(), "Content-Type": MERGE})
    body = resp.get_json()
    assert resp.status_code == 200 and body["version"] == 2
    assert (
        body["solve"]["method"] == "cold_builtin" and body["solve"]["fallback"]["reason"] == "no_stored_basis"
    )
    doc = juice_network()
    doc["constraints"]["demand_market"]["lower"] = 50
    # reference solve: scipy.optimize.linprog (HiGHS) on the changed document
    assert body["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)
