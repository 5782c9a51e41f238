"""gunicorn settings for hotbasis (``gunicorn -c deploy/gunicorn.conf.py service.wsgi:app``).

Environment: PORT (default 8750), HOTBASIS_BIND (overrides host:port),
HOTBASIS_WORKERS (default: twice the cores; the engine is CPU-bound and
mostly holds the GIL, so processes, not threads, give parallel solves, and the
second process per core keeps the core busy while the first waits on Redis's
fsync), HOTBASIS_THREADS (default 1: more threads per process only contend for
the GIL; measured in README.md, section Load),
HOTBASIS_GRACEFUL_TIMEOUT (default 30 s: on SIGTERM the workers stop accepting
connections and finish the requests in flight for up to this long),
PROMETHEUS_MULTIPROC_DIR (where the workers' metric files go; by default a fresh
temporary directory per server, removed when the server exits).
"""

import os
import shutil
import tempfile
from pathlib import Path

# prometheus_client picks multiprocess mode when this variable is set at import time: set it here, in the
# master, before any worker imports the application. A directory given from outside is emptied at start
# (stale files from an earlier server would be added to this one's counts).
_METRICS_DIR_OWNED = not os.environ.get("PROMETHEUS_MULTIPROC_DIR")
if _METRICS_DIR_OWNED:
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="hotbasis-metrics-")
METRICS_DIR = Path(os.environ["PROMETHEUS_MULTIPROC_DIR"])

bind = os.environ.get("HOTBASIS_BIND", f"127.0.0.1:{os.environ.get('PORT', '8750')}")
workers = int(os.environ.get("HOTBASIS_WORKERS", str(2 * (os.cpu_count() or 1))))
threads = int(os.environ.get("HOTBASIS_THREADS", "1"))
worker_class = "service.gunicorn_worker.BalancedThreadWorker"  # gthread that accepts only while a thread is free
timeout = int(os.environ.get("HOTBASIS_WORKER_TIMEOUT", "300"))  # a cold solve of a big model takes a while
graceful_timeout = int(os.environ.get("HOTBASIS_GRACEFUL_TIMEOUT", "30"))
keepalive = int(os.environ.get("HOTBASIS_KEEPALIVE", "5"))  # seconds an idle client connection is kept
accesslog = None  # the application writes its own JSON access line per request, with the request id
errorlog = "-"
loglevel = "info"
logconfig_dict = {
    "version": 1,
    "disable_existing_loggers": False,
    "formatters": {"json": {"()": "service.logs.JsonFormatter"}},
    "handlers": {
        "stderr": {"class": "logging.StreamHandler", "formatter": "json", "stream": "ext://sys.stderr"}
    },
    "root": {"level": "INFO", "handlers": ["stderr"]},
    "loggers": {
        "gunicorn.error": {"handlers": ["stderr"], "level": "INFO", "propagate": False},
        "gunicorn.access": {"handlers": ["stderr"], "level": "INFO", "propagate": False},
    },
}


def on_starting(server) -> None:
    """Start the metrics directory empty."""
    METRICS_DIR.mkdir(parents=True, exist_ok=True)
    for stale in METRICS_DIR.glob("*.db"):
        stale.unlink()


def child_exit(server, worker) -> None:
    """A worker is gone: let prometheus_client drop its live-only series (gauges); its counts stay."""
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid, str(METRICS_DIR))


def on_exit(server) -> None:
    if _METRICS_DIR_OWNED:
        shutil.rmtree(METRICS_DIR, ignore_errors=True)
