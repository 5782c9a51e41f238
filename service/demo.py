"""A walk through the HTTP API with an invented supply chain (run by ``deploy/local.sh up``).

Bramble & Oat, a maker of oat crackers, runs two bakeries (Riverside, Hilltop)
that send cases to two distribution centres (North DC, South DC), which serve
four customers. The weekly plan minimizes baking, freight and delivery cost.

The demo creates the model (solved cold), adds a constraint that cuts the
current plan off (a bridge closure limits one freight lane) and re-optimizes
warm by dual simplex, adds a variable that pays (a co-packer offers cheaper
cases) and re-optimizes warm by primal simplex, then prints the shadow
prices. Everything goes through HTTP with the standard library; this script
may print, the service never does.

    python -m service.demo --url http://127.0.0.1:8750 --key <api key>
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import textwrap
import urllib.error
import urllib.request
from typing import Any

BAKERIES = {"riverside": (900, 4.10), "hilltop": (700, 3.60)}  # weekly capacity (cases), baking cost per case
DCS = {"north_dc": 1000, "south_dc": 800}  # weekly throughput (cases)
CUSTOMERS = {"grocer_ames": 420, "grocer_bly": 310, "cafe_chain": 260, "school_board": 380}  # cases a week
FREIGHT = {
    ("riverside", "north_dc"): 0.60, ("riverside", "south_dc"): 0.90,
    ("hilltop", "north_dc"): 1.40, ("hilltop", "south_dc"): 0.70,
}  # fmt: skip
DELIVERY = {
    ("north_dc", "grocer_ames"): 0.50, ("north_dc", "grocer_bly"): 0.80, ("north_dc", "cafe_chain"): 0.95,
    ("north_dc", "school_board"): 1.30, ("south_dc", "grocer_ames"): 1.20, ("south_dc", "grocer_bly"): 0.60,
    ("south_dc", "cafe_chain"): 0.75, ("south_dc", "school_board"): 0.45,
}  # fmt: skip


def build_model() -> dict[str, Any]:
    """The weekly plan as a model document."""
    variables: dict[str, dict] = {}
    constraints: dict[str, dict] = {}
    for b, (cap, bake_cost) in BAKERIES.items():
        variables[f"bake[{b}]"] = {"cost": bake_cost, "upper": cap}
    for (b, d), cost in FREIGHT.items():
        variables[f"truck[{b}->{d}]"] = {"cost": cost}
    for (d, c), cost in DELIVERY.items():
        variables[f"deliver[{d}->{c}]"] = {"cost": cost}
    for b in BAKERIES:
        terms = {f"bake[{b}]": 1.0} | {f"truck[{b}->{d}]": -1.0 for d in DCS}
        constraints[f"ship_out[{b}]"] = {"terms": terms, "lower": 0, "upper": 0}
    for d, limit in DCS.items():
        inflow = {f"truck[{b}->{d}]": 1.0 for b in BAKERIES}
        outflow = {f"deliver[{d}->{c}]": -1.0 for c in CUSTOMERS}
        constraints[f"balance[{d}]"] = {"terms": inflow | outflow, "lower": 0, "upper": 0}
        constraints[f"throughput[{d}]"] = {"terms": dict(inflow), "upper": limit}
    for c, demand in CUSTOMERS.items():
        constraints[f"demand[{c}]"] = {"terms": {f"deliver[{d}->{c}]": 1.0 for d in DCS}, "lower": demand}
    return {
        "name": "Bramble & Oat weekly plan",
        "sense": "min",
        "variables": variables,
        "constraints": constraints,
    }


# the two changes of the demo
BRIDGE_CLOSURE = {
    "constraints": {
        "bridge_closure[hilltop->south_dc]": {"terms": {"truck[hilltop->south_dc]": 1.0}, "upper": 250}
    }
}
COPACKER = {
    "variables": {"copack[east->south_dc]": {"cost": 3.95, "upper": 300}},
    "constraints": {
        "balance[south_dc]": {"terms": {"copack[east->south_dc]": 1.0}},
        "throughput[south_dc]": {"terms": {"copack[east->south_dc]": 1.0}},
    },
}


class Api:
    """Just enough HTTP for the demo: JSON in, JSON out, problem details raised."""

    def __init__(self, base_url: str, key: str) -> None:
        self.base = base_url.rstrip("/")
        self.key = key

    def call(
        self, method: str, path: str, body: Any = None, content_type: str = "application/json"
    ) -> tuple[dict, dict]:
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(self.base + path, data=data, method=method)
        req.add_header("Authorization", f"Bearer {self.key}")
        req.add_header("X-Request-ID", f"demo-{method.lower()}-{abs(hash(path)) % 10**6}")
        if data is not None:
            req.add_header("Content-Type", content_type)
        try:
            with urllib.request.urlopen(req, timeout=120) as resp:
                return json.loads(resp.read() or b"{}"), dict(resp.headers)
        except urllib.error.HTTPError as err:
            problem = err.read().decode(errors="replace")
            raise SystemExit(f"{method} {path} failed with {err.code}: {problem}") from None


def _num(x: float | None, width: int = 10, digits: int = 2) -> str:
    return f"{'-':>{width}}" if x is None else f"{x:>{width},.{digits}f}"


def _amount(x: float) -> str:
    return f"{x:,.2f}".rstrip("0").rstrip(".") if x != int(x) else f"{int(x):,}"


def row_text(terms: dict[str, float], lower: float | None, upper: float | None) -> str:
    """A constraint as a planner writes it: ``a + b - 2.5 c <= 40``."""
    parts = []
    for k, (name, coef) in enumerate(terms.items()):
        sign = "-" if coef < 0 else "+"
        size = "" if abs(coef) == 1 else f"{_amount(abs(coef))} "
        if k == 0:
            parts.append(f"{'-' if coef < 0 else ''}{size}{name}")
        else:
            parts.append(f"{sign} {size}{name}")
    expr = " ".join(parts) or "0"
    if lower is not None and upper is not None:
        return (
            f"{expr} = {_amount(lower)}"
            if lower == upper
            else f"{_amount(lower)} <= {expr} <= {_amount(upper)}"
        )
    if lower is not None:
        return f"{expr} >= {_amount(lower)}"
    if upper is not None:
        return f"{expr} <= {_amount(upper)}"
    return f"{expr} (free row)"


def _bounds(lower: float | None, upper: float | None) -> str:
    if lower is None and upper is None:
        return "free"
    if lower == upper:
        return f"fixed at {_amount(lower)}"
    if upper is None:
        return f"{_amount(lower)} or more"
    if lower is None:
        return f"at most {_amount(upper)}"
    return f"{_amount(lower)} to {_amount(upper)}"


def print_model(doc: dict) -> None:
    """The model as stored: each variable with its cost and bounds, each constraint as an inequality."""
    variables, constraints = doc["variables"], doc["constraints"]
    width = max(len(n) for n in [*variables, *constraints]) + 2
    print(f"  {len(variables)} variables (cases a week), {doc.get('sense', 'min')}imize the weekly cost")
    print(f"  {'variable':<{width}}{'cost/case':>10}  bounds")
    for name, v in variables.items():
        print(f"  {name:<{width}}{v.get('cost') or 0:>10.2f}  {_bounds(v.get('lower', 0), v.get('upper'))}")
    print(f"  {len(constraints)} constraints")
    for name, con in constraints.items():
        text = row_text(con.get("terms", {}), con.get("lower"), con.get("upper"))
        # wrap long rows between terms, never inside "- name" (a no-break space holds each sign to its term)
        held = text.replace("+ ", "+\u00a0").replace("- ", "-\u00a0")
        lines = textwrap.wrap(
            held, width=max(40, 110 - width), break_long_words=False, break_on_hyphens=False
        )
        for k, line in enumerate(lines):
            print(
                f"  {name if k == 0 else '':<{width}}{'' if k == 0 else '    '}{line.replace(chr(0xA0), ' ')}"
            )


def print_plan(result: dict) -> None:
    rows = [
        (n, v["value"]) for n, v in result["solution"]["variables"].items() if abs(v["value"] or 0) > 1e-9
    ]
    print(f"  {'activity':<34}{'cases':>10}")
    for name, value in rows:
        print(f"  {name:<34}{_num(value, 10, 1)}")


def print_solve(result: dict) -> None:
    s = result["solve"]
    print(
        f"  status {result['status']}, weekly cost {_num(result['objective'], 0)}; method {s['method']}, "
        f"warm {str(s['warm']).lower()}, {s['pivots']} pivot(s), {s['time_ms']:.1f} ms in the engine"
    )
    if s.get("fallback"):
        print(f"  note: the warm start fell back to a cold solve ({s['fallback'].get('reason')})")


def print_pivot_log(result: dict) -> None:
    log = [e for e in result["pivot_log"] if "event" not in e]
    if not log:
        print("  (no pivots: the stored basis was still optimal)")
        return
    wl = max(len("leaving"), *(len(str(e["leaving"])) for e in log))
    we = max(len("entering"), *(len(str(e["entering"])) for e in log))
    print(
        f"  {'#':>3} {'algorithm':<9} {'leaving':<{wl}} {'entering':<{we}} "
        f"{'pivot':>8} {'step':>9} {'objective':>11}"
    )
    for e in log:
        print(
            f"  {e['iteration']:>3} {e['algorithm']:<9} {str(e['leaving']):<{wl}} {str(e['entering']):<{we}} "
            f"{_num(e['pivot'], 8, 3)} {_num(e['step'], 9, 2)} {_num(e['objective'], 11, 2)}"
        )
    print("  (leaving: left the basis; entering: took its place; pivot: the pivot element;")
    print("   step: how far the entering one moved; objective: weekly cost after the pivot)")


def print_changes(result: dict) -> None:
    ch = result["changes"]
    obj = ch["objective"]
    print(f"  weekly cost {_num(obj['before'], 0)} -> {_num(obj['after'], 0)} (change {obj['delta']:+,.2f})")
    for name, move in ch["variables"].items():
        print(f"  {name:<34}{_num(move['before'], 10, 1)} -> {_num(move['after'], 0, 1)}")


def print_shadow_prices(result: dict) -> None:
    print(f"  {'constraint':<36}{'activity':>10}{'shadow price':>14}")
    for name, row in result["solution"]["constraints"].items():
        if abs(row["shadow_price"] or 0) > 1e-9:
            print(f"  {name:<36}{_num(row['activity'], 10, 1)}{_num(row['shadow_price'], 14, 3)}")
    print("  (shadow price: change in weekly cost per extra unit of the constraint's binding bound)")


def run(base_url: str, key: str) -> dict[str, Any]:
    """Run the walk-through; returns the three results for callers that check them."""
    api = Api(base_url, key)
    line = "-" * 78
    print(line)
    print("1. Create the model: Bramble & Oat's weekly plan (2 bakeries, 2 DCs, 4 customers)")
    created, headers = api.call("POST", "/v1/models", build_model())
    model = f"/v1/models/{created['id']}"
    print(f"  POST /v1/models -> 201, Location {headers.get('Location')}, ETag {headers.get('ETag')}")
    stored, _ = api.call("GET", model + "?fields=solve&solution=none")
    print_model(stored["model"])
    print("  cold solve:")
    print_solve(created)
    print_plan(created)

    print(line)
    print("2. Add a constraint: a bridge closure limits truck[hilltop->south_dc] to 250 cases")
    cut, headers = api.call("PATCH", model, BRIDGE_CLOSURE, "application/merge-patch+json")
    print(f"  PATCH {model} -> 200, ETag {headers.get('ETag')}")
    print_solve(cut)
    print("  pivot log:")
    print_pivot_log(cut)
    print("  what moved:")
    print_changes(cut)

    print(line)
    print("3. Add a variable: a co-packer offers up to 300 cases delivered to south_dc at 3.95")
    added, headers = api.call("PATCH", model, COPACKER, "application/merge-patch+json")
    print(f"  PATCH {model} -> 200, ETag {headers.get('ETag')}")
    print_solve(added)
    print("  pivot log:")
    print_pivot_log(added)
    print("  what moved:")
    print_changes(added)

    print(line)
    print("4. Shadow prices of the current plan")
    print_shadow_prices(added)

    print(line)
    versions, _ = api.call("GET", model + "/versions")
    print("5. History")
    for v in versions["versions"]:
        print(
            f"  version {v['version']}: {v['method']:<12} warm {str(v['warm']).lower():<5} "
            f"{v['pivots']:>3} pivot(s), weekly cost {_num(v['objective'], 0)}"
        )
    print(line)
    print("Plans are decision support: review them before they drive orders or production.")
    return {"created": created, "cut": cut, "added": added}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--url", default=os.environ.get("HOTBASIS_URL", "http://127.0.0.1:8750"))
    parser.add_argument("--key", default=os.environ.get("HOTBASIS_DEMO_KEY", ""))
    args = parser.parse_args(argv)
    if not args.key:
        parser.error("an API key is needed (--key or HOTBASIS_DEMO_KEY)")
    out = run(args.url, args.key)
    ok = out["cut"]["solve"]["method"] == "dual" and out["added"]["solve"]["method"] == "primal"
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
