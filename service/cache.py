"""In-process cache of recent model versions, keyed by (model id, version).

A PATCH on a hot model finds the decoded model, basis and solution here and
skips reading and decoding them from Redis. ``engine_state`` is the engine's
own warm state (``SolveResult.state``: scaling and factorization of the final
basis), handed back to ``reoptimize`` on the next change of the same
(model, version); it lives only in this process and is None after a miss.
Entries are immutable once put: a version never changes, so the key alone
says an entry is current, and no invalidation is needed beyond ``drop`` on
delete. The service names a model by id and creation time
(``operations.cache_id``), so a model deleted in one process and created
again under the same id in another is not served from an old entry.

Each gunicorn worker process has its own cache; a miss only costs a read.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any

from service.store import VersionRecord


@dataclass
class CachedVersion:
    record: VersionRecord
    engine_state: Any = None  # opaque to the service; owned by the engine


class VersionCache:
    """A bounded LRU map (model id, version) -> CachedVersion, safe across threads."""

    def __init__(self, capacity: int = 16) -> None:
        self.capacity = max(0, int(capacity))
        self._items: OrderedDict[tuple[str, int], CachedVersion] = OrderedDict()
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get(self, model_id: str, version: int) -> CachedVersion | None:
        with self._lock:
            entry = self._items.get((model_id, version))
            if entry is None:
                self.misses += 1
                return None
            self._items.move_to_end((model_id, version))
            self.hits += 1
            return entry

    def put(self, model_id: str, version: int, record: VersionRecord, engine_state: Any = None) -> None:
        if self.capacity == 0:
            return
        with self._lock:
            self._items[(model_id, version)] = CachedVersion(record, engine_state)
            self._items.move_to_end((model_id, version))
            while len(self._items) > self.capacity:
                self._items.popitem(last=False)

    def drop(self, model_id: str) -> None:
        """Forget every version of ``model_id`` (also under names "<id>@<anything>")."""
        with self._lock:
            for key in [k for k in self._items if k[0] == model_id or k[0].startswith(model_id + "@")]:
                del self._items[key]

    def __len__(self) -> int:
        return len(self._items)
