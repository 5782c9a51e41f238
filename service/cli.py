"""``hotbasis``: the command line for the hotbasis service (argparse, standard library only).

    hotbasis create network.json                 # or a .mps / .mps.gz file
    hotbasis apply <model> change.json --if-match '"v3"' --idempotency-key nightly-17
    hotbasis show <model>                        # plan, shadow prices, what moved
    hotbasis pivots <model> | history <model> | conflict <model> | ranges <model>
    hotbasis restore <model> 2 | export <model> -o plan.mps | job <job id> --wait

Settings: --url / HOTBASIS_URL (default http://127.0.0.1:8750), --key /
HOTBASIS_API_KEY, --timeout. Tables for people by default; --json prints the
service's JSON answer unchanged for scripts.

Exit codes: 0 success; 2 usage error or unreadable input file; 3 the service
refused the request (HTTP 4xx, or an async job that failed with one); 4 the
service failed or could not be reached (HTTP 5xx, connection error, timeout,
an async job that failed with a 5xx or did not finish in time).
"""

from __future__ import annotations

import argparse
import gzip
import json
import math
import os
import sys
from collections.abc import Callable, Iterable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TextIO

from service.client import (
    Answer,
    ClientError,
    HotbasisClient,
    ProblemError,
    ServiceUnreachable,
    WaitTimeout,
)

EXIT_OK = 0
EXIT_USAGE = 2
EXIT_REFUSED = 3  # HTTP 4xx
EXIT_FAILED = 4  # HTTP 5xx, unreachable, timeout
DEFAULT_URL = "http://127.0.0.1:8750"


class UsageError(Exception):
    """A problem with the command line or a local file: exit code 2."""


# ====================================================================== formatting
def fmt_num(value: Any) -> str:
    """Numbers for tables: no exponent for ordinary sizes, no trailing zeros, '-' for missing."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return "inf" if value > 0 else "-inf" if value < 0 else "nan"
        if abs(value) < 1e-9:
            return "0"
        if 1e-4 <= abs(value) < 1e12:
            text = f"{value:.6f}".rstrip("0").rstrip(".")
            return text if text not in ("", "-0") else "0"
        return f"{value:.6g}"
    if isinstance(value, (list, tuple)):
        if len(value) == 2 and all(v is None or isinstance(v, (int, float)) for v in value):
            lo, hi = value
            return f"{'-inf' if lo is None else fmt_num(lo)} .. {'+inf' if hi is None else fmt_num(hi)}"
        return ", ".join(fmt_num(v) for v in value)
    if isinstance(value, dict):
        return ", ".join(f"{k}={fmt_num(v)}" for k, v in value.items())
    return str(value)


def _numeric(text: str) -> bool:
    return bool(text) and text.lstrip("+-").replace(".", "", 1).replace("e", "", 1).isdigit()


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], out: TextIO) -> int:
    """Write an aligned table (text left, numbers right); returns the number of rows."""
    cells = [[fmt_num(c) if not isinstance(c, str) else c for c in row] for row in rows]
    widths = [len(h) for h in headers]
    for row in cells:
        for k, c in enumerate(row):
            widths[k] = max(widths[k], len(c))
    right = [bool(cells) and all(_numeric(r[k]) or r[k] == "-" for r in cells) for k in range(len(headers))]

    def line(row: Sequence[str]) -> str:
        parts = [c.rjust(w) if r else c.ljust(w) for c, w, r in zip(row, widths, right)]
        return "  ".join(parts).rstrip()

    out.write(line(headers) + "\n")
    out.write("  ".join("-" * w for w in widths) + "\n")
    for row in cells:
        out.write(line(row) + "\n")
    return len(cells)


def heading(title: str, out: TextIO) -> None:
    out.write(f"\n{title}\n")


CHANGE_LABELS = {
    "rows_added": "+constraint",
    "rows_removed": "-constraint",
    "columns_added": "+variable",
    "columns_removed": "-variable",
    "row_bounds": "limits",
    "column_bounds": "bounds",
    "costs": "costs",
    "coefficients": "terms",
}


def describe_change(summary: dict[str, Any] | None) -> str:
    """One line for a change: its kinds with names (a change report) or counts (a version summary)."""
    if not summary:
        return "created"
    parts = []
    counts = summary.get("counts") or {}
    for key, label in CHANGE_LABELS.items():
        value = summary.get(key)
        if isinstance(value, list) and value:
            shown = ", ".join(str(n) for n in value[:2])
            more = int(counts.get(key, len(value))) - min(2, len(value))
            parts.append(f"{label} {shown}" + (f" (+{more})" if more > 0 else ""))
        elif isinstance(value, int) and not isinstance(value, bool) and value:
            parts.append(f"{label} x{value}")
    for key, text in (("sense", "sense"), ("objective_offset", "offset"), ("name", "name")):
        if summary.get(key) is True or summary.get(f"{key}_changed") is True:
            parts.append(text)
    if summary.get("restored_from") is not None:
        parts.append(f"restored from v{summary['restored_from']}")
    return "; ".join(parts) or "no change"


def _when(stamp: Any) -> str:
    if not isinstance(stamp, (int, float)):
        return "-"
    return datetime.fromtimestamp(stamp, UTC).strftime("%Y-%m-%d %H:%M:%S")


def render_result(result: dict[str, Any], out: TextIO, model_id: str | None = None) -> None:
    """A result of the HTTP contract: a summary line, the plan, the prices, the change report."""
    mid = model_id or result.get("id", "?")
    objective = fmt_num(result.get("objective"))
    out.write(
        f"model {mid}  version {result.get('version')}  {result.get('status')}  objective {objective}\n"
    )
    solve = result.get("solve")
    if solve:
        how = (
            f"{solve.get('method')} simplex"
            if solve.get("method") in ("dual", "primal", "both")
            else solve.get("method")
        )
        warm = "warm start" if solve.get("warm") else "cold start"
        out.write(
            f"solved by {how}, {warm}, {solve.get('pivots')} pivots, {fmt_num(solve.get('time_ms'))} ms\n"
        )
        if solve.get("fallback"):
            out.write(f"fell back to a cold solve: {fmt_num(solve['fallback'].get('reason'))}\n")
    if result.get("message"):
        out.write(f"note: {result['message']}\n")
    solution = result.get("solution")
    if solution:
        variables = solution.get("variables") or {}
        heading(f"Plan ({len(variables)} variables)", out)
        table(
            ("variable", "value", "reduced cost", "basis"),
            ((n, v.get("value"), v.get("reduced_cost"), v.get("basis") or "-") for n, v in variables.items()),
            out,
        )
        constraints = solution.get("constraints") or {}
        heading(f"Constraints and shadow prices ({len(constraints)})", out)
        table(
            ("constraint", "activity", "shadow price", "basis"),
            (
                (n, c.get("activity"), c.get("shadow_price"), c.get("basis") or "-")
                for n, c in constraints.items()
            ),
            out,
        )
    elif "solution" in result and result.get("status") != "optimal":
        out.write("no plan: the model is not at an optimum (try `conflict` for an infeasible one)\n")
    changes = result.get("changes")
    if changes:
        render_changes(changes, out)


def render_changes(changes: dict[str, Any], out: TextIO) -> None:
    """The change report of a PATCH: objective, moved variables, then any other named lists."""
    heading(f"What changed ({describe_change(changes.get('model'))})", out)
    obj = changes.get("objective") or {}
    if obj:
        delta = obj.get("delta")
        sign = "+" if isinstance(delta, (int, float)) and delta > 0 else ""
        out.write(
            f"objective {fmt_num(obj.get('before'))} -> {fmt_num(obj.get('after'))}"
            f" ({sign}{fmt_num(delta)})\n"
        )
    moved = changes.get("moved")
    if isinstance(moved, dict):
        out.write("moved: " + ", ".join(f"{v} {k}" for k, v in moved.items()) + "\n")
    variables = changes.get("variables") or {}
    if variables:
        impact = any("cost_impact" in v for v in variables.values())
        rows = []
        for name, v in variables.items():
            b, a = v.get("before"), v.get("after")
            row = [name, b, a, (a or 0.0) - (b or 0.0)]
            rows.append(row + [v.get("cost_impact")] if impact else row)
        headers = ["variable", "before", "after", "change"] + (["cost impact"] if impact else [])
        table(headers, rows, out)
        if changes.get("truncated"):
            out.write("(more variables moved; raise --limit to see them)\n")
    binding = changes.get("constraints")
    if isinstance(binding, dict) and set(binding) <= {"became_binding", "stopped_binding"}:
        for key, text in (("became_binding", "now binding"), ("stopped_binding", "no longer binding")):
            names = binding.get(key) or []
            out.write(f"{text}: {', '.join(names) if names else 'none'}\n")
    elif binding:
        render_generic(binding, out, title="constraints")
    prices = changes.get("shadow_prices")
    if isinstance(prices, dict) and prices:
        heading("Shadow prices that changed", out)
        table(
            ("constraint", "before", "after", "change"),
            (
                (
                    n,
                    p.get("before"),
                    p.get("after"),
                    None if p.get("before") is None or p.get("after") is None else p["after"] - p["before"],
                )
                for n, p in prices.items()
            ),
            out,
        )
    skip = {"model", "objective", "moved", "variables", "truncated", "constraints", "shadow_prices"}
    for key, value in changes.items():
        if key not in skip:
            render_generic(value, out, title=key.replace("_", " "))


def render_generic(value: Any, out: TextIO, title: str | None = None) -> None:
    """Any JSON answer as tables: maps of records and lists of records become tables, scalars lines."""
    if isinstance(value, dict) and value and all(isinstance(v, dict) for v in value.values()):
        if title:
            heading(title, out)
        columns = _columns(value.values())
        table(("name", *columns), ((k, *(_cell(v, c) for c in columns)) for k, v in value.items()), out)
    elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
        if title:
            heading(title, out)
        columns = _columns(value)
        table(columns, ([_cell(v, c) for c in columns] for v in value), out)
    elif isinstance(value, dict):
        if title:
            heading(title, out)
        nested = []
        for key, item in value.items():
            if isinstance(item, (dict, list)) and item and not _flat_pair(item):
                nested.append((key, item))
            else:
                out.write(f"{key}: {fmt_num(item)}\n")
        for key, item in nested:
            render_generic(item, out, title=key.replace("_", " "))
    elif isinstance(value, list) and not value:
        if title:
            out.write(f"{title}: none\n")
    else:
        out.write(f"{title + ': ' if title else ''}{fmt_num(value)}\n")


def _flat_pair(item: Any) -> bool:
    return isinstance(item, list) and all(not isinstance(v, (dict, list)) for v in item)


def _columns(records: Iterable[dict[str, Any]]) -> list[str]:
    seen: dict[str, None] = {}
    for rec in records:
        for key in rec:
            seen.setdefault(key, None)
    return list(seen)


def _cell(record: dict[str, Any], column: str) -> Any:
    value = record.get(column)
    return "-" if value is None else value


def render_pivots(result: dict[str, Any], out: TextIO) -> None:
    log = result.get("pivot_log") or []
    solve = result.get("solve") or {}
    out.write(
        f"model {result.get('id')}  version {result.get('version')}  {solve.get('method')}"
        f"  {solve.get('pivots')} pivots{'' if log else ' (no pivots logged)'}\n"
    )
    if log:
        table(
            (
                "#",
                "algorithm",
                "leaving",
                "entering",
                "pivot",
                "step",
                "objective",
                "primal inf",
                "dual inf",
                "flips",
            ),
            (
                (
                    p.get("iteration"),
                    p.get("algorithm") or "-",
                    p.get("leaving") or "-",
                    p.get("entering") or "-",
                    p.get("pivot"),
                    p.get("step"),
                    p.get("objective"),
                    p.get("primal_infeasibility"),
                    p.get("dual_infeasibility"),
                    p.get("bound_flips"),
                )
                for p in log
            ),
            out,
        )
    events = solve.get("events") or []
    if events:
        heading("Engine events", out)
        render_generic(events, out)


def render_conflict(body: dict[str, Any], out: TextIO) -> None:
    """An irreducible infeasible subset: each member's name, kind and the bound side it holds."""
    members = body.get("members") or []
    out.write(
        f"model {body.get('id')}  version {body.get('version')}: these {len(members)} limits cannot all hold;"
        " relaxing any one of them leaves the rest satisfiable\n"
    )
    rows = []
    for m in members:
        kind = "constraint" if "constraint" in m else "variable" if "variable" in m else m.get("kind", "-")
        name = m.get(kind) or m.get("name") or "-"
        side = m.get("side")
        limit = {"lower": "at least", "upper": "at most"}.get(side, side or "-")
        rows.append((kind, name, limit, m.get("bound")))
    table(("kind", "name", "holds", "bound"), rows, out)
    found = [f"{body[k]} {k}" for k in ("solves", "pivots") if body.get(k) is not None]
    if body.get("time_ms") is not None:
        found.append(f"{fmt_num(body['time_ms'])} ms")
    if found:
        out.write("found with " + ", ".join(found) + "\n")
    for note in body.get("notes") or []:
        out.write(f"note: {note}\n")


def _range(lo: Any, hi: Any) -> str:
    return f"{'-inf' if lo is None else fmt_num(lo)} .. {'+inf' if hi is None else fmt_num(hi)}"


def render_ranges(body: dict[str, Any], out: TextIO) -> None:
    """Cost ranges per variable and right-hand-side ranges per constraint."""
    out.write(
        f"model {body.get('id')}  version {body.get('version')}  {body.get('sense')}  objective"
        f" {fmt_num(body.get('objective'))}\n"
    )
    variables = body.get("variables") or {}
    heading("Costs: the plan stays optimal while a cost stays in its range", out)
    table(
        ("variable", "value", "cost", "cost range"),
        (
            (n, v.get("value"), v.get("cost"), _range(v.get("cost_lower"), v.get("cost_upper")))
            for n, v in variables.items()
        ),
        out,
    )
    constraints = body.get("constraints") or {}
    heading("Limits: the shadow price holds while the limit stays in its range", out)
    table(
        ("constraint", "activity", "shadow price", "limit range"),
        (
            (n, c.get("activity"), c.get("shadow_price"), _range(c.get("rhs_lower"), c.get("rhs_upper")))
            for n, c in constraints.items()
        ),
        out,
    )


# ====================================================================== commands
def _print_json(value: Any, out: TextIO) -> None:
    out.write(json.dumps(value, indent=2, sort_keys=False) + "\n")


def _read_model_file(path: str, form: str | None) -> tuple[str, Any]:
    """('json', document) or ('mps', bytes) from a file; gzip is kept as is for MPS (the service inflates it)."""
    try:
        data = sys.stdin.buffer.read() if path == "-" else Path(path).read_bytes()
    except OSError as exc:
        raise UsageError(f"cannot read {path}: {exc.strerror}") from None
    if form is None:
        lower = path.lower()
        if lower.endswith((".mps", ".mps.gz", ".gz")) or data[:2] == b"\x1f\x8b":
            form = "mps"
        elif lower.endswith(".json") or data.lstrip()[:1] == b"{":
            form = "json"
        else:
            form = "mps"
    if form == "json":
        return "json", _parse_json(data, path)
    if data[:2] == b"\x1f\x8b":
        try:
            gzip.decompress(data)
        except (OSError, EOFError) as exc:
            raise UsageError(f"{path}: not a readable gzip file ({exc})") from None
    return "mps", data


def _parse_json(data: bytes, path: str) -> Any:
    def refuse(token: str) -> Any:
        raise ValueError(f"{token} is not JSON; every number must be finite")

    try:
        return json.loads(data, parse_constant=refuse)
    except (ValueError, UnicodeDecodeError) as exc:
        raise UsageError(f"{path}: not valid JSON ({exc})") from None


class Progress:
    """Progress of an async job on stderr: a live line on a terminal, one line per state otherwise."""

    def __init__(self, stream: TextIO, quiet: bool = False) -> None:
        self.stream = stream
        self.quiet = quiet
        self.tty = stream.isatty()
        self.last_state: str | None = None

    def __call__(self, job: dict[str, Any], elapsed: float) -> None:
        if self.quiet:
            return
        state = job.get("state")
        text = f"job {job.get('id')}: {state} after {elapsed:.1f} s"
        if job.get("attempts"):
            text += f" (attempt {job['attempts']})"
        if self.tty:
            self.stream.write("\r" + text.ljust(60))
            if state in ("done", "failed"):
                self.stream.write("\n")
        elif state != self.last_state:
            self.stream.write(text + "\n")
        self.stream.flush()
        self.last_state = state


def _finish(client: HotbasisClient, answer: Answer, args: argparse.Namespace) -> Answer:
    """Wait for a 202's job unless --no-wait."""
    if not answer.accepted or args.no_wait:
        return answer
    if not args.json and not args.quiet:
        sys.stderr.write(
            f"queued as job {answer.body.get('id')}; waiting (Ctrl-C stops waiting, not the job)\n"
        )
    return client.wait(answer, timeout=args.wait_timeout, on_progress=Progress(sys.stderr, args.quiet))


def _show_write(answer: Answer, args: argparse.Namespace, out: TextIO) -> None:
    if args.json:
        _print_json(answer.body, out)
        return
    if answer.accepted:
        out.write(
            f"queued: job {answer.body.get('id')} ({answer.location}); `hotbasis job <id> --wait` to follow\n"
        )
        return
    if answer.replayed:
        out.write("replayed: this Idempotency-Key was used before; nothing new was applied\n")
    render_result(answer.body or {}, out)
    if answer.etag:
        out.write(f"\netag {answer.etag}\n")


def cmd_create(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    form, payload = _read_model_file(args.file, args.format)
    query = _result_query(args)
    if form == "json":
        if args.name:
            payload = {**payload, "name": args.name}
        answer = client.create(
            payload, idempotency_key=args.idempotency_key, respond_async=args.async_, query=query
        )
    else:
        if args.name:
            raise UsageError("--name applies to JSON documents (an MPS file names itself)")
        answer = client.create_mps(
            payload, idempotency_key=args.idempotency_key, respond_async=args.async_, query=query
        )
    answer = _finish(client, answer, args)
    _show_write(answer, args, out)
    return EXIT_OK


def cmd_apply(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    form, patch = _read_model_file(args.patch, "json")
    if not isinstance(patch, dict):
        raise UsageError(f"{args.patch}: a merge patch is a JSON object")
    answer = client.patch(
        args.model,
        patch,
        if_match=args.if_match,
        idempotency_key=args.idempotency_key,
        respond_async=args.async_,
        section=args.section,
        query=_result_query(args),
    )
    answer = _finish(client, answer, args)
    _show_write(answer, args, out)
    return EXIT_OK


def _result_query(args: argparse.Namespace) -> dict[str, Any]:
    query: dict[str, Any] = {"solution": "full" if getattr(args, "all", False) else "nonzero"}
    if getattr(args, "limit", None) is not None:
        query["changes_limit"] = args.limit
    return query


def cmd_show(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    query = {"model": False, **_result_query(args)}
    answer = (
        client.version(args.model, args.version, **query) if args.version else client.get(args.model, **query)
    )
    if args.json:
        _print_json(answer.body, out)
        return EXIT_OK
    render_result(answer.body["result"], out, model_id=answer.body.get("id"))
    if answer.etag:
        out.write(f"\netag {answer.etag}\n")
    return EXIT_OK


def cmd_pivots(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    query = {"model": False, "fields": "solve,pivot_log"}
    answer = (
        client.version(args.model, args.version, **query) if args.version else client.get(args.model, **query)
    )
    if args.json:
        _print_json(answer.body, out)
    else:
        render_pivots(answer.body["result"], out)
    return EXIT_OK


def cmd_models(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    answer = client.list_models(offset=args.offset, limit=args.limit)
    body = answer.body
    if args.json:
        _print_json(body, out)
        return EXIT_OK
    shown = table(
        ("model", "name", "version", "updated (UTC)"),
        (
            (m["id"], m.get("name") or "-", m.get("version"), _when(m.get("updated_at")))
            for m in body["models"]
        ),
        out,
    )
    out.write(f"{shown} of {body.get('total')} models\n")
    return EXIT_OK


def cmd_history(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    answer = client.versions(args.model)
    body = answer.body
    if args.json:
        _print_json(body, out)
        return EXIT_OK
    out.write(f"model {body.get('id')}  current version {body.get('version')}\n")
    table(
        ("version", "created (UTC)", "status", "objective", "method", "warm", "pivots", "change"),
        (
            (
                v.get("version"),
                _when(v.get("created_at")),
                v.get("status") or "-",
                v.get("objective"),
                v.get("method") or "-",
                v.get("warm"),
                v.get("pivots"),
                describe_change(v.get("changes")),
            )
            for v in body.get("versions", [])
        ),
        out,
    )
    return EXIT_OK


def cmd_conflict(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    answer = client.conflict(args.model, version=args.version)
    if args.json:
        _print_json(answer.body, out)
        return EXIT_OK
    render_conflict(answer.body, out)
    return EXIT_OK


def cmd_ranges(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    answer = client.sensitivity(args.model, version=args.version)
    if args.json:
        _print_json(answer.body, out)
        return EXIT_OK
    render_ranges(answer.body, out)
    return EXIT_OK


def cmd_restore(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    answer = client.restore(
        args.model,
        args.version,
        if_match=args.if_match,
        idempotency_key=args.idempotency_key,
        query=_result_query(args),
    )
    body = answer.body
    if args.json:
        _print_json(body, out)
        return EXIT_OK
    result = body.get("result", body) if isinstance(body, dict) else {}
    render_result(result, out)
    if answer.etag:
        out.write(f"\netag {answer.etag}\n")
    return EXIT_OK


def cmd_export(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    text = client.export_mps(args.model)
    if args.output and args.output != "-":
        Path(args.output).write_text(text)
        if not args.json:
            sys.stderr.write(f"wrote {args.output} ({len(text.splitlines())} lines)\n")
    else:
        out.write(text if text.endswith("\n") else text + "\n")
    return EXIT_OK


def cmd_job(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    if args.wait:
        job = client.wait_job(
            args.job, timeout=args.wait_timeout, on_progress=Progress(sys.stderr, args.quiet)
        )
    else:
        job = client.job(args.job)
    if args.json:
        _print_json(job, out)
        return EXIT_OK
    out.write(
        f"job {job.get('id')}  {job.get('kind')}  {job.get('state')}  model {job.get('model_id')}"
        f"  version {fmt_num(job.get('version'))}\n"
    )
    if job.get("result"):
        render_result(job["result"], out)
    return EXIT_OK


def cmd_delete(client: HotbasisClient, args: argparse.Namespace, out: TextIO) -> int:
    client.delete(args.model, if_match=args.if_match)
    if args.json:
        _print_json({"deleted": args.model}, out)
    else:
        out.write(f"deleted model {args.model}\n")
    return EXIT_OK


# ====================================================================== parser
COMMON = {  # name: (default, env variable)
    "url": (DEFAULT_URL, "HOTBASIS_URL"),
    "key": (None, "HOTBASIS_API_KEY"),
    "timeout": (60.0, None),
    "json": (False, None),
    "quiet": (False, None),
}


def _common(parser: argparse.ArgumentParser) -> None:
    # SUPPRESS so a value given before the command is not overwritten by the command's default
    s = argparse.SUPPRESS
    parser.add_argument(
        "--url", default=s, help=f"service base URL (env HOTBASIS_URL; default {DEFAULT_URL})"
    )
    parser.add_argument("--key", default=s, help="API key (env HOTBASIS_API_KEY)")
    parser.add_argument("--timeout", type=float, default=s, help="seconds per HTTP request (default 60)")
    parser.add_argument("--json", action="store_true", default=s, help="print the service's JSON answer")
    parser.add_argument("-q", "--quiet", action="store_true", default=s, help="no progress on stderr")


def _writes(parser: argparse.ArgumentParser, if_match: bool = True, asynchronous: bool = True) -> None:
    if if_match:
        parser.add_argument("--if-match", metavar="ETAG", help="apply only at this version, e.g. '\"v3\"'")
    parser.add_argument("--idempotency-key", metavar="KEY", help="retries with this key apply once")
    if asynchronous:
        parser.add_argument(
            "--async", dest="async_", action="store_true", help="ask for a job (Prefer: respond-async)"
        )
        parser.add_argument("--no-wait", action="store_true", help="with --async: print the job and return")
        parser.add_argument("--wait-timeout", type=float, default=600.0, help="seconds to wait for a job")
        parser.add_argument("--all", action="store_true", help="list every variable, not only those in use")
        parser.add_argument("--limit", type=int, help="at most this many moved variables in the report")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="hotbasis",
        description="Work with models kept by a hotbasis service: create, change, read plans and logs.",
        epilog="exit codes: 0 ok, 2 usage or input file, 3 refused by the service (4xx), "
        "4 service failed or unreachable (5xx, connection, timeout)",
    )
    _common(parser)
    sub = parser.add_subparsers(dest="command", metavar="command", required=True)

    def command(name: str, func: Callable[..., int], text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=text, description=text)
        _common(p)
        p.set_defaults(func=func)
        return p

    p = command("create", cmd_create, "create a model from a JSON document or an MPS file (solved cold)")
    p.add_argument("file", help="model file: .json, .mps or .mps.gz; '-' reads stdin")
    p.add_argument("--format", choices=("json", "mps"), help="file format when the name does not say")
    p.add_argument("--name", help="name stored with a JSON model")
    _writes(p, if_match=False)

    p = command("apply", cmd_apply, "apply a merge patch file and show the re-optimized result")
    p.add_argument("model", help="model id")
    p.add_argument("patch", help="JSON merge patch file; '-' reads stdin")
    p.add_argument("--section", choices=("constraints", "variables"), help="the file patches this map alone")
    _writes(p)

    p = command("show", cmd_show, "show a result: plan, shadow prices, change report")
    p.add_argument("model", help="model id")
    p.add_argument("--version", type=int, help="a kept version instead of the current one")
    p.add_argument("--all", action="store_true", help="every variable and constraint, not only those in use")
    p.add_argument("--limit", type=int, help="at most this many moved variables in the change report")

    p = command("pivots", cmd_pivots, "show the pivot log of the last re-optimization")
    p.add_argument("model", help="model id")
    p.add_argument("--version", type=int, help="a kept version instead of the current one")

    p = command("models", cmd_models, "list your models")
    p.add_argument("--offset", type=int, default=0)
    p.add_argument("--limit", type=int, default=50)

    p = command("history", cmd_history, "list the kept versions of a model")
    p.add_argument("model", help="model id")

    p = command("conflict", cmd_conflict, "explain why an infeasible model has no plan")
    p.add_argument("model", help="model id")
    p.add_argument("--version", type=int, help="a kept version instead of the current one")

    p = command("ranges", cmd_ranges, "cost and right-hand-side ranges of the current plan")
    p.add_argument("model", help="model id")
    p.add_argument("--version", type=int, help="a kept version instead of the current one")

    p = command("restore", cmd_restore, "make a new version equal to an older one")
    p.add_argument("model", help="model id")
    p.add_argument("version", type=int, help="the version to bring back")
    _writes(p, asynchronous=False)

    p = command("export", cmd_export, "write the model as free-format MPS")
    p.add_argument("model", help="model id")
    p.add_argument("-o", "--output", help="file to write (default: stdout)")

    p = command("job", cmd_job, "show an async job, or wait for it")
    p.add_argument("job", help="job id or its /v1/jobs/... location")
    p.add_argument("--wait", action="store_true", help="wait until it is done or failed")
    p.add_argument("--wait-timeout", type=float, default=600.0, help="seconds to wait")

    p = command("delete", cmd_delete, "delete a model and all its versions")
    p.add_argument("model", help="model id")
    p.add_argument("--if-match", metavar="ETAG", help="delete only at this version")
    return parser


def _settle(args: argparse.Namespace, env: dict[str, str]) -> None:
    for name, (default, variable) in COMMON.items():
        if not hasattr(args, name):
            setattr(args, name, env.get(variable) if variable and env.get(variable) else default)


def _report_problem(exc: ProblemError, err: TextIO) -> None:
    err.write(f"hotbasis: {exc.status} {exc.title}\n")
    if exc.detail:
        err.write(f"  {exc.detail}\n")
    for item in exc.errors[:20]:
        where = item.get("pointer", item.get("header", item.get("parameter", "")))
        if where or item.get("detail"):
            err.write(f"  at {where or '/'}: {item.get('detail', '')}\n")
    extra = {k: v for k, v in exc.problem.items() if k in ("current_version", "request_id")}
    for key, value in extra.items():
        err.write(f"  {key}: {value}\n")


def main(argv: Sequence[str] | None = None, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse exits 2 on usage errors and 0 for --help
        return int(exc.code or 0)
    _settle(args, dict(os.environ))
    client = HotbasisClient(args.url, api_key=args.key, timeout=args.timeout)
    try:
        return args.func(client, args, out)
    except UsageError as exc:
        sys.stderr.write(f"hotbasis: {exc}\n")
        return EXIT_USAGE
    except ProblemError as exc:
        if args.json:
            _print_json(exc.problem, out)
        _report_problem(exc, sys.stderr)
        return EXIT_REFUSED if 400 <= exc.status < 500 else EXIT_FAILED
    except (ServiceUnreachable, WaitTimeout) as exc:
        sys.stderr.write(f"hotbasis: {exc}\n")
        return EXIT_FAILED
    except ClientError as exc:
        sys.stderr.write(f"hotbasis: {exc}\n")
        return EXIT_FAILED
    except KeyboardInterrupt:
        sys.stderr.write("hotbasis: interrupted\n")
        return 130
    except BrokenPipeError:  # `hotbasis show ... | head`
        return EXIT_OK


def run() -> None:
    """Console-script entry point."""
    sys.exit(main())


if __name__ == "__main__":
    run()
