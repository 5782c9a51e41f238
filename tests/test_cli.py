"""The hotbasis command line end to end: a real gunicorn, redis-server and queue worker; the CLI as a subprocess."""

from __future__ import annotations

import copy
import json
import subprocess
import sys
from importlib import metadata
from pathlib import Path

import pytest
from conftest import juice_network, reference_objective
from live_service import start_service, stop_service

from service.cli import EXIT_FAILED, EXIT_REFUSED, EXIT_USAGE, fmt_num

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    svc = start_service(tmp_path_factory.mktemp("cli-live"))
    yield svc
    stop_service(svc)


def cli(live, *args: str, env: dict | None = None, stdin: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "service.cli", *args],
        capture_output=True,
        text=True,
        env=env if env is not None else live.env(),
        input=stdin,
        timeout=120,
    )


def cli_json(live, *args: str) -> dict:
    run = cli(live, "--json", *args)
    assert run.returncode == 0, run.stderr
    return json.loads(run.stdout)


def write(path: Path, obj) -> str:
    path.write_text(json.dumps(obj))
    return str(path)


@pytest.fixture
def juice(live, tmp_path):
    """A freshly created juice network: (model id, document, creation answer)."""
    doc = juice_network()
    body = cli_json(live, "create", write(tmp_path / "juice.json", doc))
    return body["id"], doc, body


def test_console_script_is_installed_with_the_package():
    scripts = {ep.name: ep.value for ep in metadata.entry_points(group="console_scripts")}
    assert scripts.get("hotbasis") == "service.cli:run"


def test_create_shows_the_plan_and_prices_in_tables(live, tmp_path):
    doc = juice_network()
    run = cli(live, "create", write(tmp_path / "juice.json", doc))
    assert run.returncode == 0, run.stderr
    out = run.stdout
    expected = reference_objective(doc)  # reference solve: scipy.optimize.linprog (HiGHS)
    assert f"objective {fmt_num(expected)}" in out.splitlines()[0]
    assert "optimal" in out.splitlines()[0]
    # the tables: headers, names, and rows aligned on the value column
    lines = out.splitlines()
    header = next(line for line in lines if line.startswith("variable "))
    assert header.split() == ["variable", "value", "reduced", "cost", "basis"]
    rows = [line for line in lines if line.startswith("ship_")]
    assert rows and len({line.index(" basic") for line in rows if " basic" in line}) == 1
    assert "demand_cafe_a" in out and "shadow price" in out and "demand_market" in out
    assert 'etag "v1"' in out


def test_json_output_and_env_or_flag_settings(live, tmp_path):
    doc = juice_network()
    path = write(tmp_path / "juice.json", doc)
    body = cli_json(live, "create", path)
    assert body["version"] == 1 and body["status"] == "optimal"
    assert body["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)  # reference: linprog
    # the same settings as flags, with nothing in the environment
    bare = {k: v for k, v in live.env().items() if not k.startswith("HOTBASIS_")}
    run = cli(live, "models", "--json", "--url", live.base, "--key", live.key, env=bare)
    assert run.returncode == 0, run.stderr
    assert body["id"] in {m["id"] for m in json.loads(run.stdout)["models"]}
    # flags before the command work too
    run = cli(live, "--url", live.base, "--key", live.key, "--json", "models", env=bare)
    assert run.returncode == 0 and json.loads(run.stdout)["total"] >= 1


def test_apply_shows_the_change_report_and_the_pivot_log(live, juice, tmp_path):
    model_id, doc, _ = juice
    cut = {"constraints": {"lane_limit_north_a": {"terms": {"ship_press_north_cafe_a": 1}, "upper": 10}}}
    run = cli(live, "apply", model_id, write(tmp_path / "cut.json", cut), "--if-match", '"v1"')
    assert run.returncode == 0, run.stderr
    out = run.stdout
    changed = copy.deepcopy(doc)
    changed["constraints"].update(cut["constraints"])
    after = reference_objective(changed)  # reference solve: linprog on the changed document
    before = reference_objective(doc)
    assert "version 2" in out.splitlines()[0] and "dual simplex, warm start" in out
    assert "What changed (+constraint lane_limit_north_a)" in out
    assert f"objective {fmt_num(before)} -> {fmt_num(after)}" in out
    assert "now binding: lane_limit_north_a" in out
    moved = out.split("What changed")[1]
    assert "ship_press_north_cafe_a" in moved and "ship_press_south_cafe_a" in moved
    assert 'etag "v2"' in out

    log = cli(live, "pivots", model_id)
    assert log.returncode == 0, log.stderr
    header = next(line for line in log.stdout.splitlines() if line.startswith("#"))
    assert header.split()[:4] == ["#", "algorithm", "leaving", "entering"]
    assert any("lane_limit_north_a" in line and "dual" in line for line in log.stdout.splitlines())

    body = cli_json(live, "pivots", model_id)["result"]
    assert body["pivot_log"] and body["pivot_log"][0]["leaving"] == "lane_limit_north_a"

    stale = cli(live, "apply", model_id, str(tmp_path / "cut.json"), "--if-match", '"v1"')
    assert stale.returncode == EXIT_REFUSED
    assert "412" in stale.stderr and "version 2" in stale.stderr

    shown = cli_json(live, "show", model_id, "--all")
    assert shown["version"] == 2
    assert shown["result"]["changes"]["objective"]["delta"] == pytest.approx(after - before, abs=1e-9)
    assert set(shown["result"]["solution"]["variables"]) == set(doc["variables"])


def test_idempotency_key_applies_once_and_history_lists_versions(live, juice, tmp_path):
    model_id, _, _ = juice
    patch = write(tmp_path / "p.json", {"constraints": {"demand_cafe_b": {"lower": 35}}})
    first = cli(live, "apply", model_id, patch, "--idempotency-key", "cli-test-35")
    assert first.returncode == 0, first.stderr
    assert "replayed" not in first.stdout
    again = cli(live, "apply", model_id, patch, "--idempotency-key", "cli-test-35")
    assert again.returncode == 0 and again.stdout.startswith("replayed")
    hist = cli(live, "history", model_id)
    assert hist.returncode == 0, hist.stderr
    rows = [line.split() for line in hist.stdout.splitlines() if line.strip()[:1].isdigit()]
    assert [r[0] for r in rows] == ["2", "1"]  # the replay stored nothing
    assert "limits demand_cafe_b" in hist.stdout or "limits x1" in hist.stdout
    assert "created" in hist.stdout
    versions = cli_json(live, "history", model_id)["versions"]
    assert [v["version"] for v in versions] == [2, 1]


def test_conflict_explains_demand_above_supply(live, juice, tmp_path):
    model_id, doc, _ = juice
    # total supply 130 (70 + 60) against 45 + 30 + 25 demand: raising the market's need to 200 cannot be met
    patch = write(tmp_path / "p.json", {"constraints": {"demand_market": {"lower": 200}}})
    run = cli(live, "apply", model_id, patch)
    assert run.returncode == 0, run.stderr
    assert "infeasible" in run.stdout.splitlines()[0] and "no plan" in run.stdout
    explained = cli(live, "conflict", model_id)
    assert explained.returncode == 0, explained.stderr
    for name in ("capacity_press_north", "capacity_press_south", "demand_market"):
        assert name in explained.stdout
    assert "at most" in explained.stdout and "at least" in explained.stdout
    body = cli_json(live, "conflict", model_id)
    names = {m.get("constraint") or m.get("variable") for m in body["members"]}
    assert {"capacity_press_north", "capacity_press_south", "demand_market"} <= names
    # ranging needs an optimum: refused, exit code 3
    refused = cli(live, "ranges", model_id)
    assert refused.returncode == EXIT_REFUSED and "409" in refused.stderr
    # back to version 1 (a new version, optimal again)
    back = cli(live, "restore", model_id, "1")
    assert back.returncode == 0, back.stderr
    assert "version 3" in back.stdout.splitlines()[0] and "optimal" in back.stdout.splitlines()[0]
    assert f"objective {fmt_num(reference_objective(doc))}" in back.stdout  # reference: linprog
    assert "restored from v1" in cli(live, "history", model_id).stdout


def test_ranges_table_matches_the_json(live, juice):
    model_id, _, _ = juice
    body = cli_json(live, "ranges", model_id)
    run = cli(live, "ranges", model_id)
    assert run.returncode == 0, run.stderr
    for name, var in body["variables"].items():
        line = next(line for line in run.stdout.splitlines() if line.startswith(name + " "))
        lo = "-inf" if var["cost_lower"] is None else fmt_num(var["cost_lower"])
        hi = "+inf" if var["cost_upper"] is None else fmt_num(var["cost_upper"])
        assert line.rstrip().endswith(f"{lo} .. {hi}")
    assert "capacity_press_south" in run.stdout


def test_export_then_create_from_mps_gives_the_same_optimum(live, juice, tmp_path):
    model_id, doc, created = juice
    target = tmp_path / "juice.mps"
    run = cli(live, "export", model_id, "-o", str(target))
    assert run.returncode == 0, run.stderr
    assert "ROWS" in target.read_text()
    again = cli_json(live, "create", str(target))
    assert again["id"] != model_id
    assert again["objective"] == pytest.approx(created["objective"], rel=1e-9)
    assert again["objective"] == pytest.approx(reference_objective(doc), rel=1e-9)  # reference: linprog


def test_async_apply_waits_with_progress_on_stderr(live, juice, tmp_path):
    model_id, doc, _ = juice
    patch = {"variables": {"ship_press_south_market": {"cost": 9}}}
    run = cli(live, "--json", "apply", model_id, write(tmp_path / "p.json", patch), "--async")
    assert run.returncode == 0, run.stderr
    body = json.loads(run.stdout)
    assert body["version"] == 2 and body["solve"]["method"] == "primal"
    changed = copy.deepcopy(doc)
    changed["variables"]["ship_press_south_market"]["cost"] = 9
    assert body["objective"] == pytest.approx(reference_objective(changed), rel=1e-9)  # reference: linprog
    assert "job " in run.stderr and ": done after" in run.stderr

    queued = cli(live, "--json", "apply", model_id, str(tmp_path / "p.json"), "--async", "--no-wait")
    job = json.loads(queued.stdout)
    assert job["state"] in ("queued", "running", "done") and job["id"]
    followed = cli(live, "job", job["id"], "--wait")
    assert followed.returncode == 0, followed.stderr
    assert f"job {job['id']}" in followed.stdout and " done " in followed.stdout


def test_exit_codes_for_usage_refusals_and_failures(live, juice, tmp_path):
    model_id, _, _ = juice
    assert cli(live, "apply", model_id).returncode == EXIT_USAGE  # missing patch file
    assert cli(live, "frobnicate").returncode == EXIT_USAGE
    missing = cli(live, "apply", model_id, str(tmp_path / "nope.json"))
    assert missing.returncode == EXIT_USAGE and "cannot read" in missing.stderr
    (tmp_path / "nan.json").write_text('{"variables": {"ship_press_north_cafe_a": {"cost": NaN}}}')
    assert cli(live, "apply", model_id, str(tmp_path / "nan.json")).returncode == EXIT_USAGE

    assert cli(live, "show", "no-such-model").returncode == EXIT_REFUSED
    bad = write(tmp_path / "bad.json", {"constraints": {"c9": {"terms": {"no_such_lane": 1}, "upper": 1}}})
    run = cli(live, "apply", model_id, bad)
    assert run.returncode == EXIT_REFUSED
    assert "400" in run.stderr and "/constraints/c9/terms/no_such_lane" in run.stderr
    run = cli(live, "--json", "apply", model_id, bad)
    problem = json.loads(run.stdout)  # scripts get the problem details on stdout
    assert (
        problem["status"] == 400 and problem["errors"][0]["pointer"] == "/constraints/c9/terms/no_such_lane"
    )
    wrong_key = cli(live, "show", model_id, "--key", "not-a-valid-key-0000000000")
    assert wrong_key.returncode == EXIT_REFUSED and "401" in wrong_key.stderr

    from conftest import free_port

    down = cli(live, "show", model_id, "--url", f"http://127.0.0.1:{free_port()}")
    assert down.returncode == EXIT_FAILED and "Connection refused" in down.stderr


def test_delete(live, juice):
    model_id, _, _ = juice
    assert cli(live, "delete", model_id, "--if-match", '"v7"').returncode == EXIT_REFUSED
    run = cli(live, "delete", model_id)
    assert run.returncode == 0 and model_id in run.stdout
    assert cli(live, "show", model_id).returncode == EXIT_REFUSED
