"""Queue worker: ``python -m service.worker`` runs jobs from the Redis stream until SIGTERM.

Each job goes through the same ModelService.create / patch as a synchronous
request, with the job id as the operation id recorded in the commit: a job
delivered twice (its first worker died after the commit, before the
acknowledgement) finds its version and only finishes the job record.

While a job runs, a heartbeat thread resets the stream entry's idle time; a
worker killed outright stops heartbeating, and after ``idle_timeout`` another
worker takes the entry over (XAUTOCLAIM). SIGTERM or SIGINT lets the job in
hand finish, acknowledges it, and exits.

Settings (environment): HOTBASIS_REDIS_URL and the model settings the API
reads, HOTBASIS_JOB_IDLE_TIMEOUT (seconds without a heartbeat before another
worker takes a job over, default 60), HOTBASIS_JOB_BLOCK (seconds one read
waits for a new job, default 1), HOTBASIS_JOB_MAX_ATTEMPTS (default 5),
HOTBASIS_JOB_TTL (seconds a finished job is kept, default 86400),
HOTBASIS_WORKER_METRICS_PORT (serve this worker's Prometheus metrics, the
re-optimizations it stored and their pivots, on GET /metrics at that port;
unset: no HTTP at all) and HOTBASIS_WORKER_METRICS_BIND (default 0.0.0.0).
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import socket
import threading
import time
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any


from service.api.errors import STORAGE_DOWN
from service.document import DocumentError, from_document
from service.jobs import JOB_TTL, Delivery, JobQueue
from service.limits import ModelTooLarge
from service.operations import ModelService, Outcome, PreconditionFailed, TooMuchContention
from service.serialize import SECTIONS, render_result
from service.store import ModelNotFound

log = logging.getLogger("hotbasis.worker")

PROBLEM_BASE = "urn:hotbasis:problem:"
# Redis unreachable, failing over or read-only for a moment (the API answers 503 for the same set):
# the job is not the problem, so it stays unacknowledged and runs again
REDIS_ERRORS = STORAGE_DOWN


def problem(job_id: str, status: int, slug: str, title: str, detail: str, **extra: Any) -> dict[str, Any]:
    """RFC 9457 problem details for a failed job (the same shape the API answers with)."""
    return {
        "type": PROBLEM_BASE + slug,
        "title": title,
        "status": status,
        "detail": detail,
        "instance": f"/v1/jobs/{job_id}",
        **extra,
    }


class Worker:
    """Takes jobs from a JobQueue and runs them through a ModelService."""

    def __init__(
        self,
        service: ModelService,
        queue: JobQueue,
        consumer: str | None = None,
        idle_timeout: float = 60.0,
        block: float = 2.0,
        max_attempts: int = 5,
    ) -> None:
        self.service = service
        self.queue = queue
        self.consumer = consumer or f"{socket.gethostname()}:{os.getpid()}:{os.urandom(3).hex()}"
        self.idle_timeout = float(idle_timeout)
        self.block = float(block)
        self.max_attempts = int(max_attempts)
        self.stopping = threading.Event()

    # ---------------------------------------------------------------- loop
    def run(self) -> None:
        """Run jobs until stop() (or SIGTERM in main); Redis outages are waited out, not fatal."""
        backoff = 0.1
        registered = False
        while not self.stopping.is_set():
            try:
                if not registered:
                    self.queue.register(self.consumer)
                    registered = True
                    log.info("worker started", extra={"consumer": self.consumer})
                self.run_once()
                backoff = 0.1
            except REDIS_ERRORS as exc:
                log.warning("job store unavailable: %s", exc)
                self.stopping.wait(backoff)
                backoff = min(backoff * 2, 5.0)
        try:
            self.queue.unregister(self.consumer)
        except REDIS_ERRORS:
            pass  # nothing held; the name just stays listed in the group
        log.info("worker stopped", extra={"consumer": self.consumer})

    def stop(self) -> None:
        self.stopping.set()

    def run_once(self) -> bool:
        """Take one job if there is one (waiting up to ``block`` seconds) and run it."""
        delivery = self.queue.next(self.consumer, int(self.block * 1000), int(self.idle_timeout * 1000))
        if delivery is None:
            return False
        self.handle(delivery)
        return True

    # ---------------------------------------------------------------- one job
    def handle(self, delivery: Delivery) -> None:
        job_id = delivery.job_id
        job = self.queue.get(job_id) if job_id else None
        if job is None or job.state in ("done", "failed"):
            # expired, malformed, or finished by a worker that died before acknowledging
            self.queue.ack(delivery.entry_id)
            return
        attempts = self.queue.start(job_id, self.consumer)
        payload = self.queue.payload(job_id)
        if payload is None or attempts > self.max_attempts:
            detail = (
                f"the job was started {attempts - 1} times without finishing (workers stopped or crashed)"
                if payload is not None
                else "the job's payload is gone (expired)"
            )
            self.queue.fail(job_id, problem(job_id, 500, "job-abandoned", "Job abandoned", detail))
            self.queue.ack(delivery.entry_id)
            return
        log.info(
            "job started",
            extra={"job_id": job_id, "kind": job.kind, "model_id": job.model_id, "attempt": attempts},
        )
        t = time.perf_counter()
        with _Heartbeat(self.queue, self.consumer, delivery.entry_id, self.idle_timeout / 3):
            try:
                outcome = self._run(payload)
            except REDIS_ERRORS:
                raise  # not acknowledged: the entry is taken over again after the idle timeout
            except Exception as exc:  # the job's own failure: record it, acknowledge, move on
                self.queue.fail(job_id, self._problem(job_id, exc))
                self.queue.ack(delivery.entry_id)
                log.info("job failed", extra={"job_id": job_id, "error": type(exc).__name__})
                return
            result = render_result(
                outcome.head.model_id,
                outcome.record,
                tuple(payload.get("sections") or SECTIONS),
                payload.get("solution") or "full",
                int(payload.get("changes_limit", 100)),
            )
            status = 201 if payload["kind"] == "create" else 200
            _test_pause("before_finish")
            self.queue.finish(
                job_id, outcome.record.version, status, f"/v1/models/{outcome.head.model_id}", result
            )
            self.queue.ack(delivery.entry_id)
        log.info(
            "job done",
            extra={
                "job_id": job_id,
                "model_id": outcome.head.model_id,
                "version": outcome.record.version,
                "replayed": outcome.replayed,
                "duration_ms": round((time.perf_counter() - t) * 1000, 2),
            },
        )

    def _run(self, payload: dict[str, Any]) -> Outcome:
        tenant, job_id = payload["tenant"], payload["job_id"]
        if payload["kind"] == "create":
            lp = from_document(payload["document"])
            # the model id was fixed when the job was queued: a redelivered create finds its model
            return self.service.create(
                tenant,
                lp,
                op_id=job_id,
                idem_key=payload["model_key"],
                cold_engine=payload.get("cold_engine"),
            )
        return self.service.patch(
            tenant, payload["model_id"], payload["patch"], if_match=payload.get("if_match"), op_id=job_id
        )

    @staticmethod
    def _problem(job_id: str, exc: Exception) -> dict[str, Any]:
        if isinstance(exc, DocumentError):
            return problem(
                job_id, 400, "invalid-document", exc.title, str(exc), errors=[e.as_dict() for e in exc.errors]
            )
        if isinstance(exc, PreconditionFailed):
            return problem(
                job_id,
                412,
                "stale-version",
                "Precondition failed",
                f"If-Match does not name the current version; the model is at version {exc.current.version}",
                current_version=exc.current.version,
            )
        if isinstance(exc, ModelTooLarge):  # the patch met a model grown by changes made meanwhile
            return problem(job_id, 413, "model-too-large", "Model too large", str(exc),
                           limit=exc.limit, size=exc.size)  # fmt: skip
        if isinstance(exc, ModelNotFound):
            return problem(job_id, 404, "model-not-found", "Model not found", "the model was deleted")
        if isinstance(exc, TooMuchContention):
            return problem(job_id, 503, "contention", "Too many concurrent changes", str(exc))
        log.exception("job raised", extra={"job_id": job_id})
        return problem(job_id, 500, "internal-error", "Internal error", "the worker failed on this job")


class _Heartbeat:
    """Keeps a stream entry's idle time low while its job runs, so no other worker takes it over."""

    def __init__(self, queue: JobQueue, consumer: str, entry_id: str, interval: float) -> None:
        self.queue, self.consumer, self.entry_id = queue, consumer, entry_id
        self.interval = max(0.05, interval)
        self.done = threading.Event()
        self.thread = threading.Thread(target=self._beat, name="job-heartbeat", daemon=True)

    def _beat(self) -> None:
        while not self.done.wait(self.interval):
            try:
                self.queue.touch(self.consumer, self.entry_id)
            except Exception as exc:  # a missed beat only risks a redelivery, which is safe
                log.warning("heartbeat failed: %s", exc)

    def __enter__(self) -> _Heartbeat:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.done.set()
        self.thread.join()


# ---------------------------------------------------------------- test-only pause
# HOTBASIS_WORKER_TEST_PAUSE="<where>:<seconds>" makes a worker sleep at one point of a job so crash
# tests can kill it there: "before_commit" (the model is solved, nothing stored yet), "after_commit"
# (the version is stored, the job not yet finished or acknowledged), "before_finish". For tests only.
def _pause_spec() -> tuple[str, float] | None:
    raw = os.environ.get("HOTBASIS_WORKER_TEST_PAUSE", "")
    if ":" not in raw:
        return None
    where, seconds = raw.split(":", 1)
    return where, float(seconds)


def _test_pause(where: str) -> None:
    spec = _pause_spec()
    if spec and spec[0] == where:
        log.info("test pause", extra={"where": where, "seconds": spec[1]})
        time.sleep(spec[1])


def _install_test_pause(store: Any) -> None:
    """Wrap the store's commit and create with the test pause (instance attributes; the class is untouched)."""
    spec = _pause_spec()
    if spec is None or spec[0] not in ("before_commit", "after_commit"):
        return

    def paused(write: Callable[..., Any]) -> Callable[..., Any]:
        def call(*args: Any, **kwargs: Any) -> Any:
            _test_pause("before_commit")
            out = write(*args, **kwargs)
            _test_pause("after_commit")
            return out

        return call

    store.commit = paused(store.commit)
    store.create = paused(store.create)


# ---------------------------------------------------------------- entry point
def serve_metrics(port: int, bind: str = "0.0.0.0") -> ThreadingHTTPServer:
    """GET /metrics: this worker's metrics (service.metrics.render), from a daemon thread."""
    from service import metrics

    class Handler(BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 (the http.server hook's name)
            if self.path.split("?")[0] != "/metrics":
                self.send_error(404)
                return
            try:
                body = metrics.render()
            except Exception:  # a scrape must not take the worker's thread down with it
                log.exception("metrics could not be rendered")
                self.send_error(500)
                return
            self.send_response(200)
            self.send_header("Content-Type", metrics.CONTENT_TYPE_LATEST)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *_args: Any) -> None:  # scrapes are not worth a log line each
            pass

    server = ThreadingHTTPServer((bind, port), Handler)
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, name="metrics", daemon=True).start()
    log.info("metrics on /metrics", extra={"port": server.server_address[1]})
    return server


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m service.worker", description=__doc__.splitlines()[0])
    parser.add_argument("--consumer", help="consumer name in the group (default host:pid:random)")
    args = parser.parse_args(argv)

    from service.app import create_app

    # the application factory builds the store and model service exactly as the API does (same
    # settings, same Redis client kind); the worker uses them without serving HTTP
    app = create_app()
    service = app.extensions["hotbasis"].service
    env = os.environ
    block = float(env.get("HOTBASIS_JOB_BLOCK", "1"))
    socket_timeout = app.config.get("REDIS_TIMEOUT")
    if socket_timeout:  # a blocking read must return before the client's socket timeout fires
        block = min(block, max(0.1, float(socket_timeout) - 1.0))
    queue = JobQueue(service.store.r, ttl=int(env.get("HOTBASIS_JOB_TTL", str(JOB_TTL))))
    worker = Worker(
        service,
        queue,
        consumer=args.consumer,
        idle_timeout=float(env.get("HOTBASIS_JOB_IDLE_TIMEOUT", "60")),
        block=block,
        max_attempts=int(env.get("HOTBASIS_JOB_MAX_ATTEMPTS", "5")),
    )
    _install_test_pause(service.store)
    if env.get("HOTBASIS_WORKER_METRICS_PORT"):
        serve_metrics(int(env["HOTBASIS_WORKER_METRICS_PORT"]), env.get("HOTBASIS_WORKER_METRICS_BIND", "0.0.0.0"))

    def on_signal(signum: int, _frame: Any) -> None:
        log.info("stopping after the job in hand", extra={"signal": signal.Signals(signum).name})
        worker.stop()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    worker.run()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
