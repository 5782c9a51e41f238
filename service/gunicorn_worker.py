"""gunicorn worker that takes a new connection only while one of its threads is free.

gunicorn's threaded worker accepts every connection it can (up to
``worker_connections``) and keeps it for its keep-alive requests. Clients that
keep their connection open (ERP integrations, load generators) therefore stay
where the first accept happened to put them: one process can end up serving
seven clients while another serves two, and the first one's clients wait in
its queue while the second process idles. An idle process of this kind takes
a new connection at once; a process whose threads are all busy takes one only
if it has taken none for BUSY_ACCEPT_PACE seconds per connection it already
holds. Otherwise the connection waits in the kernel's accept queue for a
process that is idle or less loaded: connections spread evenly, and when every
process is busy a new client still gets in within BUSY_ACCEPT_PACE times the
connections per process (0.2 s for 16 clients on 4 processes), checked when
the process next wakes (a request finishing, or gunicorn's one-second poll).
Kept-alive connections are never refused; only the taking of new ones is
paced.

Keeping each client on one process also keeps its model's version and
factorization in that process's cache (service/cache.py), which is why
closing connections after every request (``HOTBASIS_KEEPALIVE=0``) is not the
answer: it balances the load but makes most re-optimizations refactorize.
"""

from __future__ import annotations

import time

from gunicorn.workers.gthread import ThreadWorker

BUSY_ACCEPT_PACE = 0.05  # seconds per held connection between new ones taken while busy


class BalancedThreadWorker(ThreadWorker):
    def __init__(self, *args, **kwargs) -> None:
        self._busy = 0  # requests handed to the thread pool and not finished
        self._connection_cap = 0
        self._last_accept = 0.0
        super().__init__(*args, **kwargs)

    # The run loop compares nr_conns with worker_connections before every wait
    # and switches accepting on or off accordingly; a busy worker that took a
    # connection recently reports a cap it has already reached.
    @property
    def worker_connections(self) -> int:
        pause = BUSY_ACCEPT_PACE * self.nr_conns
        if self._busy >= self.cfg.threads and time.monotonic() - self._last_accept < pause:
            return min(self._connection_cap, self.nr_conns)
        return self._connection_cap

    @worker_connections.setter
    def worker_connections(self, value: int) -> None:
        self._connection_cap = value

    def accept(self, listener) -> None:
        before = self.nr_conns
        super().accept(listener)
        if self.nr_conns > before:  # another process may have taken the connection first
            self._last_accept = time.monotonic()

    def enqueue_req(self, conn) -> None:
        self._busy += 1
        super().enqueue_req(conn)

    def finish_request(self, conn, fs) -> None:
        self._busy -= 1
        super().finish_request(conn, fs)
