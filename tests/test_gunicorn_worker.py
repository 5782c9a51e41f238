"""The accept pacing of service/gunicorn_worker.py, on a real gunicorn worker object.

The worker runs end to end in every gunicorn test (tests/api/test_gunicorn.py,
tests/live_service.py and the load smoke test use deploy/gunicorn.conf.py);
here the rule itself: when may a process whose threads are all busy take a new
connection.
"""

from __future__ import annotations

import logging
import time

from gunicorn.config import Config

from service.gunicorn_worker import BUSY_ACCEPT_PACE, BalancedThreadWorker


def _worker(threads: int = 1, connections: int = 1000) -> BalancedThreadWorker:
    cfg = Config()
    cfg.set("threads", threads)
    cfg.set("worker_connections", connections)
    return BalancedThreadWorker(0, 0, [], None, 30, cfg, logging.getLogger("test"))


def _can_accept(w: BalancedThreadWorker) -> bool:
    return w.nr_conns < w.worker_connections  # the test that gunicorn's run loop makes


def test_an_idle_worker_takes_connections_up_to_the_configured_cap():
    w = _worker(connections=3)
    w.nr_conns = 2
    assert _can_accept(w)
    w.nr_conns = 3
    assert not _can_accept(w)


def test_a_busy_worker_waits_longer_the_more_connections_it_holds():
    w = _worker(threads=2)
    w._busy = 2  # both threads busy
    w.nr_conns = 4
    w._last_accept = time.monotonic()
    assert not _can_accept(w)  # just took one: the next waits BUSY_ACCEPT_PACE * 4
    w._last_accept = time.monotonic() - BUSY_ACCEPT_PACE * 4 - 0.01
    assert _can_accept(w)
    w.nr_conns = 40  # a process holding many clients waits ten times as long
    assert not _can_accept(w)
    w._busy = 1  # a free thread: take the connection now
    assert _can_accept(w)


def test_finished_requests_free_the_worker_again():
    w = _worker(threads=1)
    w.nr_conns = 1
    w._busy = 1
    w._last_accept = time.monotonic()
    assert not _can_accept(w)
    w._busy -= 1  # what finish_request does before handing the connection back
    assert _can_accept(w)


def test_an_accept_lost_to_another_process_does_not_restart_the_pause():
    """Several processes wake for one connection; those that find none must not pause again."""
    import socket

    w = _worker(threads=1)
    with socket.socket() as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen()
        listener.setblocking(False)
        w.accept(listener)  # nothing is waiting: EAGAIN, no connection taken
    assert w.nr_conns == 0
    assert w._last_accept == 0.0
