"""gunicorn settings for hotbasis (``gunicorn -c deploy/gunicorn.conf.py service.wsgi:app``).

Environment: PORT (default 8750), HOTBASIS_BIND (overrides host:port),
HOTBASIS_WORKERS (default 2: one per core here; the engine is CPU-bound and
holds the GIL, so processes, not threads, give parallel solves),
HOTBASIS_THREADS (default 4: overlap Redis and network waits within a worker).
"""

import os

bind = os.environ.get("HOTBASIS_BIND", f"127.0.0.1:{os.environ.get('PORT', '8750')}")
workers = int(os.environ.get("HOTBASIS_WORKERS", "2"))
threads = int(os.environ.get("HOTBASIS_THREADS", "4"))
worker_class = "gthread"
timeout = int(os.environ.get("HOTBASIS_WORKER_TIMEOUT", "300"))  # a cold solve of a big model takes a while
graceful_timeout = 30
keepalive = 5
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
