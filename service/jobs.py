"""Jobs: changes answered later by worker processes, queued on a Redis stream.

A job is a create or a patch that the API has fully validated and handed to
the workers instead of solving it inside the request. The queue is a Redis
Stream read through a consumer group (XADD, XREADGROUP, XACK; XAUTOCLAIM takes
over entries whose consumer stopped heartbeating), so delivery is at least
once; the worker commits with the job id as the operation id, which makes a
redelivered job find the version it produced instead of applying it twice.

Key layout (the braces are Redis Cluster hash tags; every command below
touches one slot):

    {hbq}:jobs           stream: one entry {"job": <id>} per job; consumer group "workers"
    {hbj:<id>}:job       hash: tenant, kind, state, model_id, times, attempts, worker, version,
                         status, location, result (zlib-compressed JSON), error (JSON problem details)
    {hbj:<id>}:payload   JSON: what the worker runs (kind, tenant, model id, document or patch,
                         If-Match, the result view asked for); deleted when the job ends

Payloads and results are JSON, never pickle. Job records expire ``ttl``
seconds after their last change (24 h by default).
"""

from __future__ import annotations

import base64
import secrets
import time
import zlib
from dataclasses import dataclass
from typing import Any

import orjson
import redis

STREAM = "{hbq}:jobs"
GROUP = "workers"
JOB_TTL = 24 * 3600
STATES = ("queued", "running", "done", "failed")
_ID_ALPHABET = frozenset("abcdefghijklmnopqrstuvwxyz234567")


def new_job_id() -> str:
    """20 characters of lowercase base32 (100 random bits)."""
    return base64.b32encode(secrets.token_bytes(20)).decode().lower()[:20]


def valid_job_id(text: str) -> bool:
    return len(text) == 20 and all(ch in _ID_ALPHABET for ch in text)


@dataclass
class Job:
    """What is known about one job; ``as_json`` is the body of GET /v1/jobs/{id}."""

    id: str
    tenant: str
    kind: str  # "create" | "patch"
    state: str
    model_id: str
    created_at: float
    started_at: float | None = None
    finished_at: float | None = None
    attempts: int = 0
    worker: str | None = None
    version: int | None = None
    status: int | None = None  # the HTTP status the synchronous answer would have had
    location: str | None = None
    result: dict[str, Any] | None = None
    error: dict[str, Any] | None = None

    def as_json(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "kind": self.kind,
            "state": self.state,
            "model_id": self.model_id,
            "version": self.version,
            "status": self.status,
            "location": self.location,
            "created_at": self.created_at,
            "started_at": self.started_at,
            "finished_at": self.finished_at,
            "attempts": self.attempts,
            "worker": self.worker,
            "result": self.result,
            "error": self.error,
        }


@dataclass
class Delivery:
    """One stream entry handed to a worker."""

    entry_id: str
    job_id: str | None  # None when the entry is malformed or was deleted


class JobQueue:
    """The job stream and job records in Redis."""

    def __init__(self, client: Any, ttl: int = JOB_TTL) -> None:
        self.r = client
        self.ttl = int(ttl)
        self._group_ready = False
        self._claim_cursor = "0-0"  # where the next XAUTOCLAIM scan of the pending entries starts

    @staticmethod
    def _job(job_id: str) -> str:
        return f"{{hbj:{job_id}}}:job"

    @staticmethod
    def _payload(job_id: str) -> str:
        return f"{{hbj:{job_id}}}:payload"

    def ensure_group(self) -> None:
        """Create the stream and its consumer group once (from the start, so nothing queued is missed)."""
        if self._group_ready:
            return
        try:
            self.r.xgroup_create(STREAM, GROUP, id="0", mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
        self._group_ready = True

    # ---------------------------------------------------------------- API side
    def enqueue(
        self, tenant: str, kind: str, model_id: str, payload: dict[str, Any], job_id: str | None = None
    ) -> Job:
        """Record the job, then add it to the stream.

        The record and the stream live in different slots, so they cannot share
        a transaction; the record comes first, so a worker never reads an entry
        without its job. If the XADD fails the caller answers 503 and the
        orphaned record just expires.
        """
        job_id = job_id or new_job_id()
        now = time.time()
        body = dict(payload, job_id=job_id, tenant=tenant, kind=kind, model_id=model_id)
        pipe = self.r.pipeline(transaction=True)
        pipe.hset(
            self._job(job_id),
            mapping={
                "tenant": tenant,
                "kind": kind,
                "state": "queued",
                "model_id": model_id,
                "created_at": repr(now),
                "attempts": 0,
            },
        )
        pipe.expire(self._job(job_id), self.ttl)
        pipe.set(self._payload(job_id), orjson.dumps(body), ex=self.ttl)
        pipe.execute()
        self.ensure_group()
        self.r.xadd(STREAM, {"job": job_id})
        return Job(job_id, tenant, kind, "queued", model_id, now)

    def get(self, job_id: str) -> Job | None:
        raw = self.r.hgetall(self._job(job_id))
        if not raw or b"state" not in raw:
            return None

        def num(key: bytes, cast=float):
            value = raw.get(key)
            return cast(value) if value not in (None, b"") else None

        result = raw.get(b"result")
        error = raw.get(b"error")
        worker = raw.get(b"worker")
        location = raw.get(b"location")
        return Job(
            id=job_id,
            tenant=raw[b"tenant"].decode(),
            kind=raw[b"kind"].decode(),
            state=raw[b"state"].decode(),
            model_id=raw[b"model_id"].decode(),
            created_at=float(raw[b"created_at"]),
            started_at=num(b"started_at"),
            finished_at=num(b"finished_at"),
            attempts=int(raw.get(b"attempts") or 0),
            worker=worker.decode() if worker else None,
            version=num(b"version", int),
            status=num(b"status", int),
            location=location.decode() if location else None,
            result=orjson.loads(zlib.decompress(result)) if result else None,
            error=orjson.loads(error) if error else None,
        )

    # ---------------------------------------------------------------- worker side
    def payload(self, job_id: str) -> dict[str, Any] | None:
        raw = self.r.get(self._payload(job_id))
        return orjson.loads(raw) if raw else None

    def next(self, consumer: str, block_ms: int, min_idle_ms: int) -> Delivery | None:
        """The next entry for ``consumer``: first one abandoned by a silent consumer, else a new one."""
        self.ensure_group()
        try:
            # one call scans at most ten pending entries from the cursor; keeping the cursor between calls
            # (back to 0-0 at the end) makes every entry held by a dead consumer come up in turn
            claimed = self.r.xautoclaim(
                STREAM, GROUP, consumer, min_idle_ms, start_id=self._claim_cursor, count=1
            )
            cursor = claimed[0] if claimed else b"0-0"
            self._claim_cursor = cursor.decode() if isinstance(cursor, bytes) else str(cursor)
            entries = claimed[1] if claimed else []
            if not entries:
                reply = self.r.xreadgroup(GROUP, consumer, {STREAM: ">"}, count=1, block=block_ms)
                entries = reply[0][1] if reply else []
        except redis.ResponseError as exc:
            if "NOGROUP" in str(exc):  # the stream was deleted (FLUSHALL, a new Redis): make it again
                self._group_ready = False
                return None
            raise
        if not entries:
            return None
        entry_id, fields = entries[0]
        entry_id = entry_id.decode() if isinstance(entry_id, bytes) else entry_id
        job = (fields or {}).get(b"job")
        return Delivery(entry_id, job.decode() if job else None)

    def register(self, consumer: str) -> None:
        """Make the consumer known to the group now (a blocking read that gets nothing does not)."""
        self.ensure_group()
        self.r.xgroup_createconsumer(STREAM, GROUP, consumer)

    def unregister(self, consumer: str) -> bool:
        """Remove the consumer from the group if it holds no entry (deleting one would drop its entries)."""
        held = self.r.xpending_range(STREAM, GROUP, "-", "+", 1, consumername=consumer)
        if held:
            return False
        self.r.xgroup_delconsumer(STREAM, GROUP, consumer)
        return True

    def touch(self, consumer: str, entry_id: str) -> bool:
        """Reset the entry's idle time (heartbeat): XCLAIM by its own consumer, JUSTID keeps the count."""
        return bool(self.r.xclaim(STREAM, GROUP, consumer, 0, [entry_id], justid=True))

    def start(self, job_id: str, consumer: str) -> int:
        """Mark the job running on ``consumer``; returns how many times it was started."""
        pipe = self.r.pipeline(transaction=True)
        pipe.hincrby(self._job(job_id), "attempts", 1)
        pipe.hset(
            self._job(job_id),
            mapping={"state": "running", "started_at": repr(time.time()), "worker": consumer},
        )
        pipe.expire(self._job(job_id), self.ttl)
        return int(pipe.execute()[0])

    def finish(self, job_id: str, version: int, status: int, location: str, result: dict[str, Any]) -> None:
        self._end(job_id, "done", {"version": version, "status": status, "location": location,
                                   "result": zlib.compress(orjson.dumps(result), 1)})  # fmt: skip

    def fail(self, job_id: str, problem: dict[str, Any]) -> None:
        self._end(job_id, "failed", {"status": problem["status"], "error": orjson.dumps(problem)})

    def _end(self, job_id: str, state: str, fields: dict[str, Any]) -> None:
        """Record the outcome, keep the record ``ttl`` seconds from now, drop the payload."""
        pipe = self.r.pipeline(transaction=True)
        pipe.hset(self._job(job_id), mapping={"state": state, "finished_at": repr(time.time()), **fields})
        pipe.expire(self._job(job_id), self.ttl)
        pipe.delete(self._payload(job_id))
        pipe.execute()

    def ack(self, entry_id: str) -> None:
        """Done with the entry: acknowledge it and drop it from the stream (the stream holds open work)."""
        pipe = self.r.pipeline(transaction=True)
        pipe.xack(STREAM, GROUP, entry_id)
        pipe.xdel(STREAM, entry_id)
        pipe.execute()

    def stats(self) -> dict[str, Any]:
        """Queue figures for monitoring: entries not yet finished, in a worker's hands, oldest age."""
        self.ensure_group()
        depth = int(self.r.xlen(STREAM))
        pending = self.r.xpending(STREAM, GROUP)
        in_progress = int(pending["pending"]) if pending else 0
        oldest = self.r.xrange(STREAM, "-", "+", count=1)
        age = None
        if oldest:
            first = oldest[0][0]
            first = first.decode() if isinstance(first, bytes) else first
            age = max(0.0, time.time() - int(first.split("-")[0]) / 1000.0)
        return {
            "depth": depth,
            "waiting": depth - in_progress,
            "running": in_progress,
            "oldest_age_seconds": age,
        }
