"""The nightly ERP example against a real gunicorn + redis-server: plan against a reference, re-runs apply nothing."""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from live_service import ROOT, start_service, stop_service
from scipy.optimize import linprog

from service.client import HotbasisClient
from service.examples import nightly_erp

pytestmark = pytest.mark.slow
DATA = ROOT / "service" / "examples" / "data"
CHANGES = DATA / "nightly_2026-12-02.csv"


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    svc = start_service(tmp_path_factory.mktemp("erp-live"), worker=False)
    yield svc
    stop_service(svc)


def reference_plan() -> tuple[dict[str, float], float]:
    """The base network with the night's changes applied by hand, solved by scipy.optimize.linprog (HiGHS)."""
    doc = json.loads((DATA / "tile_network.json").read_text())
    lanes = list(doc["variables"])
    cost = {lane: doc["variables"][lane]["cost"] for lane in lanes}
    upper: dict[str, float | None] = dict.fromkeys(lanes)
    capacity = {
        n[len("kiln_capacity[") : -1]: c["upper"] for n, c in doc["constraints"].items() if n[0] == "k"
    }
    demand = {n[len("demand[") : -1]: c["lower"] for n, c in doc["constraints"].items() if n[0] == "d"}
    with open(CHANGES, newline="") as fh:
        for row in csv.DictReader(fh):
            lane = f"ship[{row['kiln']}->{row['customer']}]"
            qty = float(row["quantity"]) if row["quantity"] else None
            if row["kind"] == "kiln_capacity":
                capacity[row["kiln"]] = qty
            elif row["kind"] == "demand":
                demand[row["customer"]] = qty
            elif row["kind"] == "lane_limit":
                upper[lane] = qty
            elif row["kind"] == "lane_cost":
                cost[lane] = qty
    a_ub, b_ub = [], []
    for kiln, cap in capacity.items():
        a_ub.append([1.0 if lane.startswith(f"ship[{kiln}->") else 0.0 for lane in lanes])
        b_ub.append(cap)
    for customer, need in demand.items():  # sum >= need, as -sum <= -need
        a_ub.append([-1.0 if lane.endswith(f"->{customer}]") else 0.0 for lane in lanes])
        b_ub.append(-need)
    res = linprog([cost[lane] for lane in lanes], A_ub=np.array(a_ub), b_ub=np.array(b_ub),
                  bounds=[(0, upper[lane]) for lane in lanes], method="highs")  # fmt: skip
    assert res.status == 0
    return {lane: float(x) for lane, x in zip(lanes, res.x)}, float(res.fun)


def read_plan(path: Path) -> dict[str, dict[str, float]]:
    with open(path, newline="") as fh:
        return {
            f"ship[{r['kiln']}->{r['customer']}]": {
                k: float(r[k]) for k in ("pallets", "unit_cost", "lane_cost")
            }
            for r in csv.DictReader(fh)
        }


def run_example(live, plan: Path) -> subprocess.CompletedProcess:
    return subprocess.run(
        [
            sys.executable,
            "-m",
            "service.examples.nightly_erp",
            "--changes",
            str(CHANGES),
            "--plan",
            str(plan),
        ],
        capture_output=True,
        text=True,
        env=live.env(),
        cwd=ROOT,
        timeout=120,
    )


def test_nightly_run_matches_a_reference_solve_and_a_rerun_applies_nothing(live, tmp_path):
    first = run_example(live, tmp_path / "plan.csv")
    assert first.returncode == 0, first.stderr
    assert "8 changes applied, 0 already applied" in first.stdout
    plan = read_plan(tmp_path / "plan.csv")
    expected, optimum = reference_plan()  # reference solve: scipy.optimize.linprog (HiGHS)
    assert set(plan) == set(expected)
    assert sum(p["lane_cost"] for p in plan.values()) == pytest.approx(optimum, rel=1e-9)
    for lane, qty in expected.items():  # distinct lane costs: the cheapest plan is unique
        assert plan[lane]["pallets"] == pytest.approx(qty, abs=1e-6), lane
    assert plan["ship[ashford->harbor_tiles]"]["pallets"] == pytest.approx(150)  # the dock-works limit binds

    hb = HotbasisClient(live.base, api_key=live.key)
    model_id = first.stdout.split()[1].rstrip(":")
    before = hb.versions(model_id).body
    models_before = hb.list_models().body["total"]
    assert before["version"] == 9  # version 1 plus one per line

    second = run_example(live, tmp_path / "again.csv")
    assert second.returncode == 0, second.stderr
    assert f"model {model_id}:" in second.stdout  # the base model was found again, not created twice
    assert "0 changes applied, 8 already applied" in second.stdout
    after = hb.versions(model_id).body
    assert after["version"] == 9 and after["versions"] == before["versions"]
    assert hb.list_models().body["total"] == models_before
    assert (tmp_path / "again.csv").read_bytes() == (tmp_path / "plan.csv").read_bytes()


def test_a_planner_edit_midway_is_met_by_re_reading(live, tmp_path):
    """If-Match: another writer moves the model between two lines; the script re-reads and resends."""
    hb = HotbasisClient(live.base, api_key=live.key)
    model_id = hb.create(json.loads((DATA / "tile_network.json").read_text())).model_id
    planner = HotbasisClient(live.base, api_key=live.key)

    class Interrupted(HotbasisClient):
        edits = 0

        def patch(self, *args, **kwargs):
            if self.edits < 2:  # a real concurrent change, made by a second client over HTTP
                self.edits += 1
                planner.patch(model_id, {"name": f"tile pallets (planner edit {self.edits})"})
            return super().patch(*args, **kwargs)

    client = Interrupted(live.base, api_key=live.key)
    changes = nightly_erp.read_changes(CHANGES)
    report = nightly_erp.apply_changes(client, model_id, changes)
    assert report.stale_retries == 2 and len(report.applied) == 8 and not report.already
    assert nightly_erp.write_plan(client, model_id, tmp_path / "plan.csv", report)
    assert report.version == 1 + 2 + 8
    _, optimum = reference_plan()  # reference solve: scipy.optimize.linprog (HiGHS)
    assert report.objective == pytest.approx(optimum, rel=1e-9)


def test_a_bad_line_stops_the_run_before_anything_is_sent(live, tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text(CHANGES.read_text() + "2026-12-02,kiln_capacity,ashford,,lots,typo\n")
    run = subprocess.run(
        [sys.executable, "-m", "service.examples.nightly_erp", "--changes", str(bad), "--plan", str(tmp_path / "p")],
        capture_output=True, text=True, env=live.env(), cwd=ROOT, timeout=60,
    )  # fmt: skip
    assert run.returncode == 2 and "line 10" in run.stderr and "'lots'" in run.stderr
    assert not (tmp_path / "p").exists()
