"""Prometheus metrics: requests, re-optimizations, pivots, and the job queue read at scrape time.

Counters and histograms live in prometheus_client's default registry. Under
gunicorn, ``deploy/gunicorn.conf.py`` sets PROMETHEUS_MULTIPROC_DIR before any
worker imports this module, so every worker process writes its values to files
there and ``/metrics`` (answered by whichever worker gets the scrape) adds them
up over all workers. Without that variable (tests, a single process) the values
are the process's own.

Labels never carry tenant names or model ids: routes are URL rule templates
(``/v1/models/<model_id>``), so the number of series stays bounded and
``/metrics`` reveals nothing about any tenant's models.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable, Iterable
from typing import TYPE_CHECKING, Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Histogram,
    generate_latest,
)
from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector

if TYPE_CHECKING:  # Flask only for the wiring below; workers count solves without it
    from flask import Flask

log = logging.getLogger("hotbasis.metrics")

LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0)
PIVOT_BUCKETS = (0, 1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000)

REQUESTS = Counter(
    "hotbasis_http_requests_total", "HTTP requests answered, by method, route template and status",
    ["method", "route", "status"],
)  # fmt: skip
LATENCY = Histogram(
    "hotbasis_http_request_duration_seconds", "Time from request start to response, by route and status",
    ["method", "route", "status"], buckets=LATENCY_BUCKETS,
)  # fmt: skip
REOPTIMIZATIONS = Counter(
    "hotbasis_reoptimizations_total",
    "Solves whose result was stored, by method (warm_dual, warm_primal, warm_dual_primal, warm_none, "
    "cold, fallback) and fallback reason (empty unless method is fallback)",
    ["method", "fallback_reason"],
)
PIVOTS = Histogram(
    "hotbasis_reoptimization_pivots", "Simplex pivots per stored solve, by method",
    ["method"], buckets=PIVOT_BUCKETS,
)  # fmt: skip

# the engine's method names (service/lp/result.py) -> metric label
_METHODS = {
    "dual": "warm_dual",
    "primal": "warm_primal",
    "dual+primal": "warm_dual_primal",
    "primal+dual": "warm_dual_primal",
    "none": "warm_none",  # the carried-over basis was already optimal
}


def method_label(solve: dict[str, Any]) -> tuple[str, str]:
    """(method, fallback_reason) labels for a result's ``solve`` section."""
    fallback = solve.get("fallback")
    if fallback:
        return "fallback", str(fallback.get("reason") or "unknown")
    method = str(solve.get("method") or "")
    if method.startswith("cold"):
        return "cold", ""
    return _METHODS.get(method, "other"), ""


def observe_solve(solve: dict[str, Any]) -> None:
    """Count one stored solve (a created model or a new version) and its pivots."""
    method, reason = method_label(solve)
    REOPTIMIZATIONS.labels(method, reason).inc()
    PIVOTS.labels(method).observe(float(solve.get("pivots") or 0))


# ---------------------------------------------------------------- job queue


class QueueCollector(Collector):
    """Depth and age of the job queue, read from its Redis stream when /metrics is scraped.

    ``source`` returns (redis client, stream key, consumer group) or None while
    there is no queue. Redis trouble leaves the queue figures out of that scrape
    (and sets hotbasis_job_queue_up to 0); it never fails the scrape.
    """

    def __init__(self, source: Callable[[], tuple[Any, str, str] | None]) -> None:
        self.source = source

    def collect(self) -> Iterable[GaugeMetricFamily]:
        up = GaugeMetricFamily("hotbasis_job_queue_up", "1 if the job queue could be read at this scrape")
        try:
            found = self.source()
            stats = None if found is None else queue_stats(*found)
        except Exception as exc:  # never fail a scrape because Redis is away
            log.warning("job queue not readable for metrics: %s", type(exc).__name__)
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1 if stats is not None else 0)
        yield up
        if stats is None:
            return
        for name, help_text in (
            ("length", "Entries in the job stream (XLEN)"),
            ("waiting", "Jobs not yet handed to any worker"),
            ("pending", "Jobs handed to a worker and not yet acknowledged"),
            ("oldest_age_seconds", "Age of the oldest job that is waiting or pending (0 when none)"),
        ):
            metric = GaugeMetricFamily(f"hotbasis_job_queue_{name}", help_text)
            metric.add_metric([], float(stats[name]))
            yield metric


def _id_ms(entry_id: bytes | str) -> int:
    text = entry_id.decode() if isinstance(entry_id, bytes) else entry_id
    return int(text.split("-", 1)[0])


def queue_stats(client: Any, stream: str, group: str, now: float | None = None) -> dict[str, float]:
    """Depth and age of a Redis stream consumed by one consumer group.

    waiting: entries after the group's last delivered id; pending: delivered
    and not acknowledged (XPENDING); the oldest age comes from the entry ids,
    which are the milliseconds at which each job was added.
    """
    now_ms = (time.time() if now is None else now) * 1000.0
    length = int(client.xlen(stream))
    waiting = pending = 0
    oldest_ms: float | None = None
    groups = client.xinfo_groups(stream) if length or client.exists(stream) else []
    info = next((grp for grp in groups if _text(grp.get("name")) == group), None)
    if info is None:  # no group yet: every entry waits
        waiting = length
        if length:
            first = client.xrange(stream, "-", "+", count=1)
            oldest_ms = _id_ms(first[0][0]) if first else None
    else:
        last = _text(info.get("last-delivered-id")) or "0-0"
        after = client.xrange(stream, f"({last}", "+", count=1)
        if after:
            oldest_ms = _id_ms(after[0][0])
        lag = info.get("lag")
        if lag is None:  # Redis < 7 or an unknown lag: count the undelivered entries
            lag = len(client.xrange(stream, f"({last}", "+"))
        waiting = int(lag)
        summary = client.xpending(stream, group)
        pending = int(summary.get("pending") or 0)
        if pending and summary.get("min"):
            first_pending = _id_ms(summary["min"])
            oldest_ms = first_pending if oldest_ms is None else min(oldest_ms, first_pending)
    age = 0.0 if oldest_ms is None else max(0.0, (now_ms - oldest_ms) / 1000.0)
    return {"length": length, "waiting": waiting, "pending": pending, "oldest_age_seconds": age}


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else ("" if value is None else str(value))


def job_queue_source(app: Flask) -> Callable[[], tuple[Any, str, str] | None]:
    """Where the job queue lives: the store's Redis client and service.jobs.STREAM / GROUP."""

    def source() -> tuple[Any, str, str] | None:
        try:
            from service import jobs  # the queue module; absent until jobs exist
        except ImportError:
            return None
        stream = getattr(jobs, "STREAM", None)
        group = getattr(jobs, "GROUP", None)
        if not stream or not group:
            return None
        return app.extensions["hotbasis"].service.store.r, str(stream), str(group)

    return source


# ---------------------------------------------------------------- Flask wiring


def render(extra: Iterable[Collector] = ()) -> bytes:
    """The exposition text: every process's values under gunicorn, this process's otherwise."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        from prometheus_client import multiprocess

        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry)
    else:
        registry = CollectorRegistry()
        registry.register(_Forward(REGISTRY))
    for collector in extra:
        registry.register(collector)
    return generate_latest(registry)


class _Forward(Collector):
    """Expose the default registry's metrics inside a per-scrape registry (extra collectors come and go)."""

    def __init__(self, source: CollectorRegistry) -> None:
        self.source = source

    def collect(self) -> Iterable[Any]:
        return self.source.collect()


def init_app(app: Flask) -> None:
    """Serve /metrics and count every request. /metrics needs no key (see DEVELOPERS.md)."""
    from flask import Response, g, request

    queue = QueueCollector(job_queue_source(app))

    @app.get("/metrics")
    def metrics() -> Response:
        try:
            body = render([queue])
        except Exception:  # a broken metrics file must not turn a scrape into a 5xx
            log.exception("metrics could not be rendered")
            body = b"# metrics unavailable, see the service log\n"
        return Response(body, content_type=CONTENT_TYPE_LATEST, headers={"Cache-Control": "no-store"})

    @app.after_request
    def count(resp: Response) -> Response:
        try:
            rule = request.url_rule.rule if request.url_rule is not None else "<unmatched>"
            status = str(resp.status_code)
            elapsed = time.perf_counter() - g.get("started", time.perf_counter())
            REQUESTS.labels(request.method, rule, status).inc()
            LATENCY.labels(request.method, rule, status).observe(elapsed)
        except Exception:  # metrics are never worth a failed request
            log.exception("request metrics not recorded")
        return resp
