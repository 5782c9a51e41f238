"""Nightly ERP feed: capacity and demand changes from a CSV, applied to a hotbasis model, plan to CSV.

The scenario (invented): three tile kilns (ashford, bramley, corran) ship
pallets to five customers. Every night the ERP exports the day's changes, one
per line:

    night,kind,kiln,customer,quantity,note
    2026-12-02,kiln_capacity,bramley,,260,kiln 2 relining        -> kiln_capacity[bramley] upper 260
    2026-12-02,demand,,harbor_tiles,205,promotion                 -> demand[harbor_tiles] lower 205
    2026-12-02,lane_limit,ashford,harbor_tiles,150,dock works       -> ship[ashford->harbor_tiles] upper 150
    2026-12-02,lane_cost,corran,pine_street_depot,5.40,surcharge  -> ship[corran->pine_street_depot] cost 5.40

An empty quantity on lane_limit lifts the limit. Each line becomes one RFC 7396
merge patch, sent with

* an Idempotency-Key derived from the model id and the line itself, so running
  the same file again applies nothing twice. The service also fingerprints
  If-Match, so a line whose key was used on an earlier run answers 422
  (idempotency-key-reused) rather than replaying; that answer means the line is
  already applied, and it is counted as such;
* If-Match with the ETag of the version the script last saw, so a change made
  meanwhile by someone else is noticed (412): the script re-reads the model and
  sends the line again on the new version (the values are absolute, so the
  line means the same on any version).

Then the plan (every lane: kiln, customer, pallets, cost) is written to CSV.

    python -m service.examples.nightly_erp --changes service/examples/data/nightly_2026-12-02.csv \\
        --plan plan.csv [--model <id> | --base service/examples/data/tile_network.json]

Settings: --url / HOTBASIS_URL, --key / HOTBASIS_API_KEY. Exit codes: 0 plan
written; 1 the model has no optimal plan after the changes; 2 a bad CSV line
(nothing sent); 3 the service refused a change; 4 the service failed or could
not be reached.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import json
import os
import re
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from service.client import HotbasisClient, ProblemError, ServiceUnreachable

DATA = Path(__file__).resolve().parent / "data"
LANE = re.compile(r"^ship\[(?P<kiln>[^\]]+)->(?P<customer>[^\]]+)\]$")
FIELDS = ("night", "kind", "kiln", "customer", "quantity", "note")
MAX_STALE_RETRIES = 8


class FeedError(ValueError):
    """A CSV line that cannot be turned into a change."""


@dataclass
class Change:
    """One CSV line and the merge patch it stands for."""

    line: int
    raw: dict[str, str]
    patch: dict[str, Any]

    def key(self, model_id: str) -> str:
        """Idempotency-Key: the same model and the same line always give the same key."""
        canon = json.dumps([model_id, *(self.raw.get(f, "").strip() for f in FIELDS[:5])])
        return "erp-" + hashlib.sha256(canon.encode()).hexdigest()[:40]


@dataclass
class RunReport:
    model_id: str
    applied: list[int] = field(default_factory=list)  # CSV line numbers applied by this run
    already: list[int] = field(default_factory=list)  # applied by an earlier run (same key)
    stale_retries: int = 0
    version: int | None = None
    status: str | None = None
    objective: float | None = None


def _quantity(row: dict[str, str], line: int, allow_empty: bool = False) -> float | None:
    text = (row.get("quantity") or "").strip()
    if not text:
        if allow_empty:
            return None
        raise FeedError(f"line {line}: quantity is empty")
    try:
        value = float(text)
    except ValueError:
        raise FeedError(f"line {line}: quantity {text!r} is not a number") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise FeedError(f"line {line}: quantity must be finite")
    return value


def to_patch(row: dict[str, str], line: int) -> dict[str, Any]:
    """The merge patch for one CSV line."""
    kind = (row.get("kind") or "").strip()
    kiln = (row.get("kiln") or "").strip()
    customer = (row.get("customer") or "").strip()
    if kind == "kiln_capacity":
        if not kiln:
            raise FeedError(f"line {line}: kiln_capacity needs a kiln")
        return {"constraints": {f"kiln_capacity[{kiln}]": {"upper": _quantity(row, line)}}}
    if kind == "demand":
        if not customer:
            raise FeedError(f"line {line}: demand needs a customer")
        return {"constraints": {f"demand[{customer}]": {"lower": _quantity(row, line)}}}
    if kind in ("lane_limit", "lane_cost"):
        if not kiln or not customer:
            raise FeedError(f"line {line}: {kind} needs a kiln and a customer")
        lane = f"ship[{kiln}->{customer}]"
        if kind == "lane_limit":  # empty quantity: no limit (null on a bound means unbounded)
            return {"variables": {lane: {"upper": _quantity(row, line, allow_empty=True)}}}
        return {"variables": {lane: {"cost": _quantity(row, line)}}}
    raise FeedError(f"line {line}: unknown kind {kind!r}")


def read_changes(path: Path) -> list[Change]:
    """Every line of the nightly file as a Change; any bad line stops the run before anything is sent."""
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        missing = [f for f in FIELDS[:5] if f not in (reader.fieldnames or [])]
        if missing:
            raise FeedError(f"{path}: missing columns {', '.join(missing)}")
        changes = []
        for row in reader:
            line = reader.line_num
            if not any((v or "").strip() for v in row.values()):
                continue
            changes.append(Change(line, {k: v or "" for k, v in row.items() if k}, to_patch(row, line)))
    return changes


def ensure_model(client: HotbasisClient, model_id: str | None, base: Path) -> str:
    """The model to change: the given id, or the base network created once (keyed by the file's content)."""
    if model_id:
        return model_id
    data = base.read_bytes()
    key = "erp-base-" + hashlib.sha256(data).hexdigest()[:40]
    created = client.create(
        json.loads(data), idempotency_key=key, query={"fields": "solve", "solution": "none"}
    )
    return created.model_id


def current_etag(client: HotbasisClient, model_id: str) -> str:
    answer = client.get(model_id, model="false", fields="solve", solution="none")
    return answer.etag


def apply_changes(client: HotbasisClient, model_id: str, changes: Sequence[Change]) -> RunReport:
    """Send each change once, in file order, with If-Match and its Idempotency-Key."""
    report = RunReport(model_id)
    etag = current_etag(client, model_id)
    for change in changes:
        key = change.key(model_id)
        for _attempt in range(MAX_STALE_RETRIES):
            try:
                answer = client.patch(
                    model_id,
                    change.patch,
                    if_match=etag,
                    idempotency_key=key,
                    query={"fields": "solve", "solution": "none"},
                )
            except ProblemError as exc:
                if exc.status == 412:  # someone else changed the model: read it again, resend the line
                    report.stale_retries += 1
                    etag = exc.headers.get("etag") or current_etag(client, model_id)
                    continue
                if exc.status == 422 and exc.slug == "idempotency-key-reused":
                    report.already.append(change.line)  # this line's key was used by an earlier run
                    break
                raise
            if answer.replayed:
                report.already.append(change.line)
            else:
                report.applied.append(change.line)
            etag = answer.etag or current_etag(client, model_id)
            break
        else:
            raise ProblemError(
                412, {"title": "Model kept changing", "detail": f"line {change.line}: gave up"}
            )
    return report


def write_plan(client: HotbasisClient, model_id: str, path: Path, report: RunReport) -> bool:
    """Every lane with its pallets and cost; False (and no file) when there is no optimal plan."""
    body = client.get(model_id, solution="full", fields="solution,solve").body
    result = body["result"]
    report.version, report.status, report.objective = body["version"], result["status"], result["objective"]
    if result["status"] != "optimal" or not result.get("solution"):
        return False
    costs = {name: var.get("cost", 0.0) for name, var in body["model"]["variables"].items()}
    values = result["solution"]["variables"]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(["kiln", "customer", "pallets", "unit_cost", "lane_cost"])
        for name in sorted(values):
            match = LANE.match(name)
            if not match:
                continue
            pallets = round(values[name]["value"], 6) + 0.0
            out.writerow(
                [
                    match["kiln"],
                    match["customer"],
                    pallets,
                    costs[name],
                    round(pallets * costs[name], 6) + 0.0,
                ]
            )
    return True


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Apply a nightly CSV of capacity and demand changes.")
    parser.add_argument("--changes", required=True, type=Path, help="the nightly CSV")
    parser.add_argument("--plan", required=True, type=Path, help="where to write the plan CSV")
    parser.add_argument("--model", help="model id (default: create --base once and reuse it)")
    parser.add_argument("--base", type=Path, default=DATA / "tile_network.json", help="base network (JSON)")
    parser.add_argument("--url", default=os.environ.get("HOTBASIS_URL", "http://127.0.0.1:8750"))
    parser.add_argument("--key", default=os.environ.get("HOTBASIS_API_KEY"))
    args = parser.parse_args(argv)

    try:
        changes = read_changes(args.changes)
    except (FeedError, OSError) as exc:
        print(f"nightly_erp: {exc}", file=sys.stderr)
        return 2
    client = HotbasisClient(args.url, api_key=args.key)
    try:
        model_id = ensure_model(client, args.model, args.base)
        report = apply_changes(client, model_id, changes)
        written = write_plan(client, model_id, args.plan, report)
    except ProblemError as exc:
        print(f"nightly_erp: {exc}", file=sys.stderr)
        for item in exc.errors:
            print(f"  at {item.get('pointer', '')}: {item.get('detail', '')}", file=sys.stderr)
        return 3 if 400 <= exc.status < 500 else 4
    except ServiceUnreachable as exc:
        print(f"nightly_erp: {exc}", file=sys.stderr)
        return 4
    print(
        f"model {model_id}: {len(report.applied)} changes applied, {len(report.already)} already applied "
        f"earlier, {report.stale_retries} stale-version retries; version {report.version}, "
        f"{report.status}, cost {report.objective}"
    )
    if not written:
        print("nightly_erp: no optimal plan after these changes; no plan file written", file=sys.stderr)
        return 1
    print(f"plan written to {args.plan}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
