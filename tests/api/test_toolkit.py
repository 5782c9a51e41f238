"""The planner's toolkit over HTTP: conflicts, change reports, sensitivity, restore, MPS export."""

from __future__ import annotations

import gzip

import highspy
import numpy as np
import orjson
import pytest
from conftest import auth, juice_network, reference_objective

from service.document import from_document
from service.lp.check import verify_farkas
from service.lp.highs_cold import highs_ranging
from service.lp.mps import read_mps
from service.lp.model import LinearProgram
from tests.lp.netlib import netlib_problems

MERGE = "application/merge-patch+json"
MPS = "text/x-mps"


def create(client, doc: dict) -> str:
    resp = client.post("/v1/models", json=doc, headers=auth())
    assert resp.status_code == 201, resp.get_json()
    return resp.get_json()["id"]


def patch(client, mid: str, body: dict, headers: dict | None = None, query: str = ""):
    return client.patch(
        f"/v1/models/{mid}{query}",
        data=orjson.dumps(body),
        content_type=MERGE,
        headers={**auth(), **(headers or {})},
    )


def version(client, mid: str, n: int) -> dict:
    resp = client.get(f"/v1/models/{mid}/versions/{n}", headers=auth())
    assert resp.status_code == 200
    return resp.get_json()


def two_plants() -> dict:
    """Two plants feed one customer; plant B has a supply contract (invented)."""
    return {
        "name": "contract plan",
        "sense": "min",
        "variables": {
            "make[A]": {"cost": 5, "upper": None},
            "make[B]": {"cost": 4},
            "ship[A]": {"cost": 1},
            "ship[B]": {"cost": 2},
        },
        "constraints": {
            "capacity[A]": {"terms": {"make[A]": 1}, "upper": 100},
            "capacity[B]": {"terms": {"make[B]": 1}, "upper": 40},
            "flow[A]": {"terms": {"make[A]": 1, "ship[A]": -1}, "lower": 0, "upper": 0},
            "flow[B]": {"terms": {"make[B]": 1, "ship[B]": -1}, "lower": 0, "upper": 0},
            "contract_min[B]": {"terms": {"ship[B]": 1}, "lower": 30},
            "demand": {"terms": {"ship[A]": 1, "ship[B]": 1}, "lower": 90},
        },
    }


# ---------------------------------------------------------------- reference checks (HiGHS)


def highs_status(lp: LinearProgram) -> str:
    """Feasibility by HiGHS (reference solver via highspy), zero costs."""
    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    inf = highspy.kHighsInf
    h.addVars(lp.n, np.maximum(lp.col_lower, -inf), np.minimum(lp.col_upper, inf))
    csr = lp.A.tocsr()
    h.addRows(
        lp.m,
        np.maximum(lp.row_lower, -inf),
        np.minimum(lp.row_upper, inf),
        csr.nnz,
        csr.indptr[:-1].astype(np.int32),
        csr.indices.astype(np.int32),
        csr.data,
    )
    h.run()
    status = h.getModelStatus()
    if status == highspy.HighsModelStatus.kInfeasible:
        return "infeasible"
    assert status == highspy.HighsModelStatus.kOptimal, h.modelStatusToString(status)
    return "feasible"


def only(lp: LinearProgram, members: list[dict]) -> LinearProgram:
    """The model keeping only the named bound sides (everything else relaxed)."""
    work = lp.copy()
    col = {n: j for j, n in enumerate(lp.col_names)}
    row = {n: i for i, n in enumerate(lp.row_names)}
    keep = set()
    for m in members:
        kind = "constraint" if "constraint" in m else "variable"
        keep.add((kind, (row if kind == "constraint" else col)[m[kind]], m["side"]))
    for kind, lo, up in (
        ("variable", work.col_lower, work.col_upper),
        ("constraint", work.row_lower, work.row_upper),
    ):
        for k in range(lo.size):
            if (kind, k, "lower") not in keep:
                lo[k] = -np.inf
            if (kind, k, "upper") not in keep:
                up[k] = np.inf
    return work


def assert_irreducible(lp: LinearProgram, members: list[dict]) -> None:
    assert members
    assert highs_status(only(lp, members)) == "infeasible"  # reference: HiGHS, the set alone
    for k in range(len(members)):  # dropping any one member makes the rest feasible (HiGHS)
        rest = members[:k] + members[k + 1 :]
        assert highs_status(only(lp, rest)) == "feasible", f"{members[k]} is not needed"


# ---------------------------------------------------------------- 1. conflicts


def test_contract_minimum_above_plant_capacity(client):
    mid = create(client, two_plants())
    resp = patch(client, mid, {"constraints": {"contract_min[B]": {"lower": 60}}})
    assert resp.status_code == 200
    body = resp.get_json()
    assert body["version"] == 2 and body["status"] == "infeasible" and body["objective"] is None
    farkas = body["certificate"]["farkas"]
    assert farkas and all(v != 0 for v in farkas.values())
    doc = version(client, mid, 2)["model"]
    lp = from_document(doc)
    y = np.array([farkas.get(name, 0.0) for name in lp.row_names])
    assert verify_farkas(lp, y)["passed"]
    assert highs_status(lp) == "infeasible"  # reference: HiGHS agrees the version is infeasible

    # the infeasible version is stored; the last feasible one stays readable
    v1 = version(client, mid, 1)["result"]
    assert v1["status"] == "optimal" and v1["objective"] == pytest.approx(reference_objective(two_plants()))

    resp = client.get(f"/v1/models/{mid}/conflict", headers=auth())
    assert resp.status_code == 200
    found = resp.get_json()
    assert found["version"] == 2 and found["size"] == len(found["members"])
    assert {"constraint": "contract_min[B]", "side": "lower", "bound": 60.0} in found["members"]
    named = {m.get("constraint") or m.get("variable") for m in found["members"]}
    assert "capacity[B]" in named and "demand" not in named and "capacity[A]" not in named
    assert found["solves"] >= len(found["members"]) and found["time_ms"] >= 0
    assert_irreducible(lp, found["members"])
    # same answer by explicit version, and 409 for a version that is not infeasible
    again = client.get(f"/v1/models/{mid}/conflict?version=2", headers=auth()).get_json()
    assert again["members"] == found["members"]
    resp = client.get(f"/v1/models/{mid}/conflict?version=1", headers=auth())
    assert resp.status_code == 409 and resp.mimetype == "application/problem+json"
    assert client.get(f"/v1/models/{mid}/conflict?version=7", headers=auth()).status_code == 404


def test_demand_above_total_supply(client):
    mid = create(client, juice_network())  # supply 70 + 60 = 130, demand 100
    resp = patch(client, mid, {"constraints": {"demand_market": {"lower": 80}}})  # demand 135
    assert resp.get_json()["status"] == "infeasible"
    found = client.get(f"/v1/models/{mid}/conflict", headers=auth()).get_json()
    lp = from_document(version(client, mid, 2)["model"])
    roles = {(m.get("constraint") or m.get("variable"), m["side"]) for m in found["members"]}
    # every buyer's minimum against both presses' capacities
    assert {
        ("capacity_press_north", "upper"),
        ("capacity_press_south", "upper"),
        ("demand_cafe_a", "lower"),
        ("demand_cafe_b", "lower"),
        ("demand_market", "lower"),
    } <= roles
    assert_irreducible(lp, found["members"])
    # fixing it brings back a plan, and the conflict is gone
    resp = patch(client, mid, {"constraints": {"demand_market": {"lower": 45}}})
    assert resp.get_json()["status"] == "optimal"
    assert client.get(f"/v1/models/{mid}/conflict", headers=auth()).status_code == 409


@pytest.mark.skipif("sc205" not in {p.name for p in netlib_problems()}, reason="shared Netlib data not found")
def test_infeasible_variant_of_a_netlib_upload(client):
    problem = next(p for p in netlib_problems() if p.name == "sc205")
    resp = client.post("/v1/models", data=problem.path.read_bytes(), content_type=MPS, headers=auth())
    mid = resp.get_json()["id"]
    doc = client.get(f"/v1/models/{mid}", headers=auth()).get_json()["model"]
    name, con = next(iter(doc["constraints"].items()))
    above = (con["upper"] if con["upper"] is not None else con["lower"]) + 1e4  # far above what it allows
    resp = patch(client, mid, {"constraints": {name: {"lower": above, "upper": None}}})
    assert resp.get_json()["status"] == "infeasible"
    found = client.get(f"/v1/models/{mid}/conflict", headers=auth()).get_json()
    assert {"constraint": name, "side": "lower", "bound": above} in found["members"]
    assert_irreducible(from_document(version(client, mid, 2)["model"]), found["members"])


# ---------------------------------------------------------------- 2. change report


def test_change_report_against_reference_solves(client):
    doc = juice_network()
    mid = create(client, doc)
    cut = {"constraints": {"capacity_press_south": {"upper": 35}}}
    resp = patch(client, mid, cut)
    body = resp.get_json()
    rep = body["changes"]
    changed = juice_network()
    changed["constraints"]["capacity_press_south"]["upper"] = 35
    # reference solve: scipy.optimize.linprog (HiGHS) on both documents
    before, after = reference_objective(doc), reference_objective(changed)
    assert rep["objective"]["before"] == pytest.approx(before)
    assert rep["objective"]["after"] == pytest.approx(after)
    assert rep["objective"]["delta"] == pytest.approx(after - before) and after > before

    v1, v2 = version(client, mid, 1)["result"]["solution"], body["solution"]
    x1 = {k: v["value"] for k, v in v1["variables"].items()}
    x2 = {k: v["value"] for k, v in v2["variables"].items()}
    moved = {k for k in x2 if abs(x2[k] - x1[k]) > 1e-9}
    assert set(rep["variables"]) == moved and rep["moved"]["variables"] == len(moved)
    impacts = []
    for name, entry in rep["variables"].items():
        assert entry["before"] == pytest.approx(x1[name]) and entry["after"] == pytest.approx(x2[name])
        impacts.append(doc["variables"][name]["cost"] * (x2[name] - x1[name]))
    assert [abs(v) for v in impacts] == sorted((abs(v) for v in impacts), reverse=True)  # biggest first
    assert sum(impacts) == pytest.approx(after - before)  # no moved variable left out

    def binding(sol, model):
        out = set()
        for name, row in sol["constraints"].items():
            con = model["constraints"][name]
            if any(
                b is not None and abs(row["activity"] - b) <= 1e-7
                for b in (con.get("lower"), con.get("upper"))
            ):
                out.add(name)
        return out

    b1, b2 = binding(v1, doc), binding(v2, changed)
    assert set(rep["constraints"]["became_binding"]) == b2 - b1
    assert set(rep["constraints"]["stopped_binding"]) == b1 - b2
    y1 = {k: v["shadow_price"] for k, v in v1["constraints"].items()}
    y2 = {k: v["shadow_price"] for k, v in v2["constraints"].items()}
    assert set(rep["shadow_prices"]) == {k for k in y2 if abs(y2[k] - y1[k]) > 1e-9}
    for name, entry in rep["shadow_prices"].items():
        assert (entry["before"], entry["after"]) == (pytest.approx(y1[name]), pytest.approx(y2[name]))
    # shadow price of the cut capacity against the reference: finite difference of linprog optima
    bumped = juice_network()
    bumped["constraints"]["capacity_press_south"]["upper"] = 36
    assert y2["capacity_press_south"] == pytest.approx(reference_objective(bumped) - after, abs=1e-7)

    # compact: the limit parameter caps every list and says so
    resp = patch(
        client, mid, {"constraints": {"capacity_press_south": {"upper": 30}}}, query="?changes_limit=1"
    )
    rep = resp.get_json()["changes"]
    assert len(rep["variables"]) <= 1 and len(rep["shadow_prices"]) <= 1
    assert rep["truncated"] is True and rep["moved"]["variables"] > 1


# ---------------------------------------------------------------- 3. sensitivity


def wyndor() -> dict:
    # Textbook: Hillier & Lieberman, "Introduction to Operations Research" (7th ed., 2001),
    # the Wyndor Glass Co. product mix: max 3 x1 + 5 x2, x1 <= 4, 2 x2 <= 12, 3 x1 + 2 x2 <= 18.
    return {
        "sense": "max",
        "variables": {"doors": {"cost": 3}, "windows": {"cost": 5}},
        "constraints": {
            "plant1": {"terms": {"doors": 1}, "upper": 4},
            "plant2": {"terms": {"windows": 2}, "upper": 12},
            "plant3": {"terms": {"doors": 3, "windows": 2}, "upper": 18},
        },
    }


def test_sensitivity_of_the_textbook_example(client):
    mid = create(client, wyndor())
    resp = client.get(f"/v1/models/{mid}/sensitivity", headers=auth())
    assert resp.status_code == 200
    body = resp.get_json()
    assert body["sense"] == "max" and body["objective"] == pytest.approx(36.0)
    v, c = body["variables"], body["constraints"]
    # Textbook sensitivity report for Wyndor (values from memory):
    # 0 <= c1 <= 7.5, c2 >= 2; b1 >= 2, 6 <= b2 <= 18, 12 <= b3 <= 24; shadow prices 0, 1.5, 1.
    assert (v["doors"]["cost_lower"], v["doors"]["cost_upper"]) == (pytest.approx(0.0, abs=1e-9), 7.5)
    assert v["windows"]["cost_lower"] == pytest.approx(2.0) and v["windows"]["cost_upper"] is None
    assert c["plant1"]["rhs_lower"] == pytest.approx(2.0) and c["plant1"]["rhs_upper"] is None
    assert (c["plant2"]["rhs_lower"], c["plant2"]["rhs_upper"]) == (pytest.approx(6.0), pytest.approx(18.0))
    assert (c["plant3"]["rhs_lower"], c["plant3"]["rhs_upper"]) == (pytest.approx(12.0), pytest.approx(24.0))
    assert [c[k]["shadow_price"] for k in ("plant1", "plant2", "plant3")] == [
        pytest.approx(0.0, abs=1e-9),
        pytest.approx(1.5),
        pytest.approx(1.0),
    ]
    # the old version stays rangeable; an infeasible version is refused
    resp = patch(client, mid, {"variables": {"doors": {"lower": 7}}})  # 3 * 7 doors > 18 in plant3
    assert resp.get_json()["status"] == "infeasible"
    assert client.get(f"/v1/models/{mid}/sensitivity", headers=auth()).status_code == 409
    old = client.get(f"/v1/models/{mid}/sensitivity?version=1", headers=auth())
    assert old.status_code == 200 and old.get_json()["variables"] == v


def _cost_ranges_match(body: dict, lp: LinearProgram) -> None:
    ref = highs_ranging(lp)  # reference: HiGHS's own ranging (getRanging) at its optimal basis
    for j, name in enumerate(lp.col_names):
        ours = body["variables"][name]
        for key, theirs in (("cost_lower", ref.cost_lower[j]), ("cost_upper", ref.cost_upper[j])):
            if np.isfinite(theirs):
                assert ours[key] == pytest.approx(theirs, rel=1e-6, abs=1e-7), (name, key)
            else:
                assert ours[key] is None, (name, key)


def test_sensitivity_cost_ranges_match_highs_on_a_small_model(client):
    mid = create(client, juice_network())
    body = client.get(f"/v1/models/{mid}/sensitivity", headers=auth()).get_json()
    _cost_ranges_match(body, from_document(juice_network()))


NETLIB = {p.name: p for p in netlib_problems()}


@pytest.mark.skipif("afiro" not in NETLIB, reason="shared Netlib data not found")
def test_sensitivity_cost_ranges_match_highs_on_netlib_upload(client):
    problem = NETLIB["afiro"]
    data = problem.path.read_bytes()
    resp = client.post("/v1/models", data=data, content_type=MPS, headers=auth())
    assert resp.status_code == 201
    # Netlib published optimum, shared/data/netlib/optimal.csv
    assert resp.get_json()["objective"] == pytest.approx(problem.optimum, rel=1e-8)
    body = client.get(f"/v1/models/{resp.get_json()['id']}/sensitivity", headers=auth()).get_json()
    _cost_ranges_match(body, read_mps(problem.path))


# ---------------------------------------------------------------- 4. restore


def test_restore_is_a_warm_new_version_equal_to_the_old_one(client):
    mid = create(client, juice_network())
    v1 = version(client, mid, 1)
    lane = {"constraints": {"lane_cap": {"terms": {"ship_press_south_market": 1}, "upper": 10}}}
    assert patch(client, mid, lane).status_code == 200
    drop = {
        "variables": {"ship_press_north_cafe_a": {"cost": 9}, "ship_press_south_cafe_b": None},
        "constraints": {
            name: {"terms": {"ship_press_south_cafe_b": None}}
            for name in ("capacity_press_south", "demand_cafe_b")
        },
    }
    assert patch(client, mid, drop).status_code == 200
    resp = client.post(f"/v1/models/{mid}/versions/1/restore", headers={**auth(), "If-Match": '"v3"'})
    assert resp.status_code == 200 and resp.headers["ETag"] == '"v4"'
    body = resp.get_json()
    assert body["version"] == 4 and body["restored_from"] == 1
    assert body["solve"]["warm"] is True and body["solve"]["method"] != "cold_highs"
    assert body["objective"] == pytest.approx(v1["result"]["objective"])
    assert body["objective"] == pytest.approx(reference_objective(juice_network()))  # reference: linprog
    v4 = version(client, mid, 4)
    assert v4["model"]["variables"] == v1["model"]["variables"]
    assert v4["model"]["constraints"] == v1["model"]["constraints"]
    assert v4["result"]["restored_from"] == 1
    summaries = client.get(f"/v1/models/{mid}/versions", headers=auth()).get_json()["versions"]
    assert summaries[0]["version"] == 4 and summaries[0]["changes"]["restored_from"] == 1

    # If-Match: a stale ETag is refused and nothing is stored
    resp = client.post(f"/v1/models/{mid}/versions/2/restore", headers={**auth(), "If-Match": '"v3"'})
    assert resp.status_code == 412
    assert client.get(f"/v1/models/{mid}", headers=auth()).get_json()["version"] == 4
    # Idempotency-Key: a retry replays the stored answer and applies nothing new
    key = {**auth(), "Idempotency-Key": "restore-2-once"}
    first = client.post(f"/v1/models/{mid}/versions/2/restore", headers=key)
    again = client.post(f"/v1/models/{mid}/versions/2/restore", headers=key)
    assert first.status_code == again.status_code == 200
    assert again.headers["Hotbasis-Replayed"] == "true" and again.get_json() == first.get_json()
    assert client.get(f"/v1/models/{mid}", headers=auth()).get_json()["version"] == 5
    assert client.post(f"/v1/models/{mid}/versions/99/restore", headers=auth()).status_code == 404


def test_restore_of_a_pruned_version_is_404(client):
    mid = create(client, juice_network())
    for k in range(21):  # the store keeps the last 20 versions
        assert (
            patch(client, mid, {"constraints": {"demand_market": {"lower": 40 + k % 2}}}).status_code == 200
        )
    first = client.get(f"/v1/models/{mid}/versions", headers=auth()).get_json()["versions"][-1]["version"]
    assert first > 1
    resp = client.post(f"/v1/models/{mid}/versions/1/restore", headers=auth())
    assert resp.status_code == 404 and resp.get_json()["type"].endswith("version-not-found")
    assert client.post(f"/v1/models/{mid}/versions/{first}/restore", headers=auth()).status_code == 200


# ---------------------------------------------------------------- 5. MPS export


def test_mps_export_round_trip(client):
    doc = juice_network()
    doc["variables"]["spot buy market"] = {"cost": 12, "upper": 5}  # a name free MPS cannot hold
    doc["constraints"]["demand_market"]["terms"]["spot buy market"] = 1
    mid = create(client, doc)
    resp = client.get(f"/v1/models/{mid}", headers={**auth(), "Accept": MPS})
    assert resp.status_code == 200 and resp.mimetype == MPS and resp.headers["Vary"] == "Accept"
    text = resp.get_data(as_text=True)
    assert text.startswith("NAME") and "ROWS" in text and "spot buy market" not in text.split("ROWS")[1]
    assert client.get(f"/v1/models/{mid}", headers=auth()).mimetype == "application/json"  # default
    for body in (text.encode(), gzip.compress(text.encode())):
        back = client.post("/v1/models", data=body, content_type=MPS, headers=auth())
        assert back.status_code == 201
        got = back.get_json()
        assert got["objective"] == pytest.approx(reference_objective(doc))  # reference: linprog
        names = client.get(f"/v1/models/{got['id']}", headers=auth()).get_json()["model"]["variables"]
        assert set(names) == set(doc["variables"])


def test_mps_export_of_a_kept_version(client):
    """Accept: text/x-mps on /versions/{n} gives that version's model, not the latest one."""
    doc = juice_network()
    mid = create(client, doc)
    changed = client.patch(
        f"/v1/models/{mid}",
        data=orjson.dumps({"constraints": {"capacity_press_north": {"upper": 50}}}),
        headers={**auth(), "Content-Type": "application/merge-patch+json"},
    )
    assert changed.status_code == 200 and changed.get_json()["version"] == 2
    texts = {}
    for n in (1, 2):
        resp = client.get(f"/v1/models/{mid}/versions/{n}", headers={**auth(), "Accept": MPS})
        assert resp.status_code == 200 and resp.mimetype == MPS and resp.headers["ETag"] == f'"v{n}-mps"'
        texts[n] = resp.get_data(as_text=True)
    assert texts[1] != texts[2]
    old = client.post("/v1/models", data=texts[1].encode(), content_type=MPS, headers=auth())
    assert old.status_code == 201
    assert old.get_json()["objective"] == pytest.approx(reference_objective(doc))  # reference: linprog
    doc["constraints"]["capacity_press_north"]["upper"] = 50
    new = client.post("/v1/models", data=texts[2].encode(), content_type=MPS, headers=auth())
    assert new.get_json()["objective"] == pytest.approx(reference_objective(doc))  # reference: linprog


def test_sensitivity_of_a_model_created_again_under_its_id_is_its_own(client, rclient):
    """A model deleted and created again under the same id (same Idempotency-Key once its record is
    gone) is another model: its ranging must not be the cached answer computed for the old one."""
    key = {"Idempotency-Key": "wyndor-plan-3"}
    mid = client.post("/v1/models", json=wyndor(), headers={**auth(), **key}).get_json()["id"]
    first = client.get(f"/v1/models/{mid}/sensitivity", headers=auth()).get_json()
    assert first["variables"]["doors"]["cost"] == 3
    assert client.delete(f"/v1/models/{mid}", headers=auth()).status_code == 204
    for k in rclient.keys("{hbi:*"):
        rclient.delete(k)
    second = wyndor()
    second["variables"]["doors"]["cost"] = 4
    resp = client.post("/v1/models", json=second, headers={**auth(), **key})
    assert resp.status_code == 201 and resp.get_json()["id"] == mid
    body = client.get(f"/v1/models/{mid}/sensitivity", headers=auth()).get_json()
    assert body["variables"]["doors"]["cost"] == 4
    assert body["objective"] == pytest.approx(reference_objective(second))  # reference: linprog
