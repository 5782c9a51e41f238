"""A small Python client for the hotbasis HTTP API (standard library only).

    from service.client import HotbasisClient
    hb = HotbasisClient("http://127.0.0.1:8750", api_key="...")
    created = hb.create(document)                      # Answer: .body (result), .etag, .model_id
    changed = hb.patch(created.model_id, {"constraints": {"cap[mill_east]": {"upper": 90}}},
                       if_match=created.etag, idempotency_key="nightly-2026-12-02-7")
    print(changed.body["objective"], changed.body["changes"]["objective"]["delta"])

Every error answer becomes a :class:`ProblemError` that carries the RFC 9457
problem details (status, type, title, detail, errors with JSON pointers);
a service that cannot be reached raises :class:`ServiceUnreachable`.

Retries: GET and DELETE, and POST/PATCH sent with an Idempotency-Key, are
retried a bounded number of times after a connection failure, and after a 503
(or a 409 "still running" for a keyed request) that carries Retry-After. A
POST or PATCH without a key is never retried: the client cannot know whether
the first attempt was applied.
"""

from __future__ import annotations

import http.client
import json
import socket
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

JSON = "application/json"
MERGE_PATCH = "application/merge-patch+json"
MPS = "text/x-mps"
JOB_STATES_OPEN = ("queued", "running")


class ClientError(Exception):
    """Base of everything this module raises."""


class ProblemError(ClientError):
    """The service answered with an error: its RFC 9457 problem details, parsed."""

    def __init__(self, status: int, problem: dict[str, Any], headers: dict[str, str] | None = None) -> None:
        self.status = status
        self.problem = problem
        self.headers = headers or {}
        self.type: str = str(problem.get("type") or "about:blank")
        self.title: str = str(problem.get("title") or f"HTTP {status}")
        self.detail: str = str(problem.get("detail") or "")
        self.errors: list[dict[str, Any]] = list(problem.get("errors") or [])
        super().__init__(f"{status} {self.title}" + (f": {self.detail}" if self.detail else ""))

    @property
    def slug(self) -> str:
        """The last part of the problem type (``stale-version``, ``invalid-document``, ...)."""
        return self.type.rsplit(":", 1)[-1].rsplit("/", 1)[-1]

    @property
    def pointers(self) -> list[str]:
        """JSON pointers of the offending fields, in the order the service listed them."""
        return [str(e["pointer"]) for e in self.errors if "pointer" in e]


class ServiceUnreachable(ClientError):
    """No HTTP answer at all: connection refused or reset, DNS, timeout."""


class JobFailed(ProblemError):
    """An async job ended in state ``failed``; ``problem`` is the job's error."""


class WaitTimeout(ClientError):
    """A job was still open when the caller's wait ran out."""


@dataclass
class Answer:
    """One HTTP answer: status, headers (lower-cased names), and the parsed body (or text)."""

    status: int
    headers: dict[str, str]
    body: Any
    job: dict[str, Any] | None = field(default=None)  # the finished job, when the answer came from one

    @property
    def etag(self) -> str | None:
        return self.headers.get("etag")

    @property
    def location(self) -> str | None:
        return self.headers.get("location")

    @property
    def replayed(self) -> bool:
        """True when the service answered from a stored Idempotency-Key record (nothing applied)."""
        return self.headers.get("hotbasis-replayed", "").lower() == "true"

    @property
    def accepted(self) -> bool:
        """True for 202: the work was queued; wait for it with :meth:`HotbasisClient.wait`."""
        return self.status == 202

    @property
    def model_id(self) -> str | None:
        if isinstance(self.body, dict):
            if self.accepted:
                return self.body.get("model_id")
            return self.body.get("id")
        return None

    @property
    def version(self) -> int | None:
        return self.body.get("version") if isinstance(self.body, dict) else None


@dataclass
class RetryPolicy:
    """How often and how long to retry a safe request."""

    attempts: int = 4  # first try included
    max_wait: float = 10.0  # seconds; a longer Retry-After is cut to this
    connect_backoff: float = 0.25  # first wait after a connection failure, doubled each time


class HotbasisClient:
    """Talks to one hotbasis service with one API key."""

    def __init__(
        self,
        base_url: str,
        api_key: str | None = None,
        timeout: float = 60.0,
        retry: RetryPolicy | None = None,
        user_agent: str = "hotbasis-client/0.1",
    ) -> None:
        self.base_url = base_url.rstrip("/")
        self.api_key = api_key
        self.timeout = timeout
        self.retry = retry or RetryPolicy()
        self.user_agent = user_agent
        self.sleep: Callable[[float], None] = time.sleep  # replaceable, e.g. to record waits

    # ------------------------------------------------------------------ transport
    def request(
        self,
        method: str,
        path: str,
        *,
        body: bytes | None = None,
        content_type: str | None = None,
        accept: str = JSON,
        headers: dict[str, str] | None = None,
        query: dict[str, Any] | None = None,
    ) -> Answer:
        """Send one request (with the retry policy) and return the answer, or raise ProblemError."""
        url = self.base_url + path
        if query:
            pairs = {k: _query_value(v) for k, v in query.items() if v is not None}
            if pairs:
                url += "?" + urllib.parse.urlencode(pairs)
        sent = {"Accept": accept, "User-Agent": self.user_agent, **(headers or {})}
        if self.api_key:
            sent["Authorization"] = f"Bearer {self.api_key}"
        if content_type:
            sent["Content-Type"] = content_type
        retryable = method in ("GET", "HEAD", "DELETE", "PUT") or "Idempotency-Key" in sent
        attempt = 0
        while True:
            attempt += 1
            req = urllib.request.Request(url, data=body, method=method, headers=sent)
            try:
                with urllib.request.urlopen(req, timeout=self.timeout) as resp:
                    return _answer(resp.status, resp.headers, resp.read())
            except urllib.error.HTTPError as exc:
                status, resp_headers, raw = exc.code, exc.headers, exc.read()
                exc.close()
                wait = _retry_after(resp_headers)
                transient = status == 503 or (status == 409 and "Idempotency-Key" in sent)
                if retryable and transient and wait is not None and attempt < self.retry.attempts:
                    self.sleep(min(wait, self.retry.max_wait))
                    continue
                raise _problem(status, resp_headers, raw) from None
            except (urllib.error.URLError, http.client.HTTPException, ConnectionError, socket.timeout) as exc:
                if retryable and attempt < self.retry.attempts:
                    self.sleep(min(self.retry.connect_backoff * 2 ** (attempt - 1), self.retry.max_wait))
                    continue
                reason = getattr(exc, "reason", exc)
                raise ServiceUnreachable(f"{method} {url}: {reason}") from None

    def _json(self, method: str, path: str, doc: Any, content_type: str = JSON, **kw: Any) -> Answer:
        return self.request(
            method, path, body=json.dumps(doc, allow_nan=False).encode(), content_type=content_type, **kw
        )

    # ------------------------------------------------------------------ models
    def create(
        self,
        document: dict[str, Any],
        *,
        idempotency_key: str | None = None,
        respond_async: bool = False,
        query: dict[str, Any] | None = None,
    ) -> Answer:
        """POST a model document; 201 with the cold result (or 202 with a job when async)."""
        return self._json(
            "POST",
            "/v1/models",
            document,
            headers=_write_headers(idempotency_key, None, respond_async),
            query=query,
        )

    def create_mps(
        self,
        mps: str | bytes,
        *,
        idempotency_key: str | None = None,
        respond_async: bool = False,
        query: dict[str, Any] | None = None,
    ) -> Answer:
        """POST an MPS file (text, or gzip bytes); the service reads it and solves it cold."""
        data = mps.encode() if isinstance(mps, str) else mps
        return self.request(
            "POST",
            "/v1/models",
            body=data,
            content_type=MPS,
            headers=_write_headers(idempotency_key, None, respond_async),
            query=query,
        )

    def get(self, model_id: str, **query: Any) -> Answer:
        """GET the model: ``{"id", "version", "model", "result"}``. Query: fields, solution, model, ..."""
        return self.request("GET", f"/v1/models/{_seg(model_id)}", query=query)

    def list_models(self, offset: int = 0, limit: int = 50) -> Answer:
        """One page of the caller's models (``models``, ``total``, ``next``)."""
        return self.request("GET", "/v1/models", query={"offset": offset, "limit": limit})

    def delete(self, model_id: str, *, if_match: str | None = None) -> Answer:
        return self.request(
            "DELETE", f"/v1/models/{_seg(model_id)}", headers=_write_headers(None, if_match, False)
        )

    def patch(
        self,
        model_id: str,
        patch: dict[str, Any],
        *,
        if_match: str | None = None,
        idempotency_key: str | None = None,
        respond_async: bool = False,
        section: str | None = None,
        query: dict[str, Any] | None = None,
    ) -> Answer:
        """Apply an RFC 7396 merge patch (of the whole document, or of ``section``'s map alone)."""
        path = f"/v1/models/{_seg(model_id)}" + (f"/{section}" if section else "")
        return self._json(
            "PATCH",
            path,
            patch,
            content_type=MERGE_PATCH,
            headers=_write_headers(idempotency_key, if_match, respond_async),
            query=query,
        )

    def patch_constraints(self, model_id: str, patch: dict[str, Any], **kw: Any) -> Answer:
        """Merge patch of the ``constraints`` map alone."""
        return self.patch(model_id, patch, section="constraints", **kw)

    def patch_variables(self, model_id: str, patch: dict[str, Any], **kw: Any) -> Answer:
        """Merge patch of the ``variables`` map alone."""
        return self.patch(model_id, patch, section="variables", **kw)

    def versions(self, model_id: str) -> Answer:
        """Summary per kept version, newest first."""
        return self.request("GET", f"/v1/models/{_seg(model_id)}/versions")

    def version(self, model_id: str, number: int, **query: Any) -> Answer:
        """Document and result as they were at version ``number``."""
        return self.request("GET", f"/v1/models/{_seg(model_id)}/versions/{int(number)}", query=query)

    def restore(
        self,
        model_id: str,
        number: int,
        *,
        if_match: str | None = None,
        idempotency_key: str | None = None,
        query: dict[str, Any] | None = None,
    ) -> Answer:
        """Make a new version equal to version ``number`` (re-optimized warm from the current basis)."""
        return self.request(
            "POST",
            f"/v1/models/{_seg(model_id)}/versions/{int(number)}/restore",
            headers=_write_headers(idempotency_key, if_match, False),
            query=query,
        )

    def conflict(self, model_id: str, version: int | None = None) -> Answer:
        """For an infeasible version: an irreducible set of conflicting constraints and bounds, by name."""
        return self.request("GET", f"/v1/models/{_seg(model_id)}/conflict", query={"version": version})

    def sensitivity(self, model_id: str, version: int | None = None) -> Answer:
        """Cost ranges per variable and right-hand-side ranges per constraint (optimal versions)."""
        return self.request("GET", f"/v1/models/{_seg(model_id)}/sensitivity", query={"version": version})

    def export_mps(self, model_id: str) -> str:
        """The model as free-format MPS text."""
        return self.request("GET", f"/v1/models/{_seg(model_id)}", accept=MPS).body

    # ------------------------------------------------------------------ jobs
    def job(self, job_id_or_location: str) -> dict[str, Any]:
        """The job record: ``state`` is queued, running, done or failed."""
        path = job_id_or_location
        if not path.startswith("/"):
            path = f"/v1/jobs/{_seg(path)}"
        elif path.startswith(self.base_url):
            path = path[len(self.base_url) :]
        return self.request("GET", path).body

    def wait_job(
        self,
        job_id_or_location: str,
        *,
        timeout: float = 600.0,
        on_progress: Callable[[dict[str, Any], float], None] | None = None,
        first_wait: float = 0.1,
        max_wait: float = 2.0,
    ) -> dict[str, Any]:
        """Poll a job until it is done (returned) or failed (JobFailed), backing off up to ``max_wait``.

        ``on_progress(job, elapsed_seconds)`` is called after every poll.
        """
        started = time.monotonic()
        wait = first_wait
        while True:
            job = self.job(job_id_or_location)
            elapsed = time.monotonic() - started
            if on_progress is not None:
                on_progress(job, elapsed)
            state = job.get("state")
            if state == "done":
                return job
            if state == "failed":
                error = job.get("error") or {
                    "title": "Job failed",
                    "detail": "the job ended without a result",
                }
                raise JobFailed(int(error.get("status") or job.get("status") or 500), error)
            if state not in JOB_STATES_OPEN:
                raise ClientError(f"job {job.get('id')}: unknown state {state!r}")
            if elapsed + wait > timeout:
                raise WaitTimeout(f"job {job.get('id')} still {state} after {elapsed:.1f} s")
            self.sleep(wait)
            wait = min(wait * 1.6, max_wait)

    def wait(self, answer: Answer, **kw: Any) -> Answer:
        """Turn a 202 answer into the final one (status and result of the finished job); others pass through."""
        if not answer.accepted:
            return answer
        job = self.wait_job(answer.location or answer.body["id"], **kw)
        headers = {}
        if job.get("location"):
            headers["location"] = job["location"]
        return Answer(status=int(job.get("status") or 200), headers=headers, body=job.get("result"), job=job)


# ---------------------------------------------------------------------- helpers
def _seg(text: str) -> str:
    return urllib.parse.quote(str(text), safe="")


def _query_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return ",".join(str(v) for v in value)
    return str(value)


def _write_headers(idempotency_key: str | None, if_match: str | None, respond_async: bool) -> dict[str, str]:
    headers: dict[str, str] = {}
    if idempotency_key is not None:
        headers["Idempotency-Key"] = idempotency_key
    if if_match is not None:
        headers["If-Match"] = if_match
    if respond_async:
        headers["Prefer"] = "respond-async"  # RFC 7240
    return headers


def _answer(status: int, headers: Any, raw: bytes) -> Answer:
    lowered = {k.lower(): v for k, v in headers.items()}
    ctype = lowered.get("content-type", "").split(";")[0].strip()
    if not raw:
        body: Any = None
    elif ctype.endswith("json"):
        body = json.loads(raw)
    else:
        body = raw.decode("utf-8", "replace")
    return Answer(status=status, headers=lowered, body=body)


def _problem(status: int, headers: Any, raw: bytes) -> ProblemError:
    lowered = {k.lower(): v for k, v in (headers or {}).items()}
    try:
        problem = json.loads(raw) if raw else {}
        if not isinstance(problem, dict):
            raise ValueError("not an object")
    except ValueError:  # a proxy's HTML page, say: keep the text as the detail
        problem = {"status": status, "detail": raw.decode("utf-8", "replace")[:500]}
    return ProblemError(status, problem, lowered)


def _retry_after(headers: Any) -> float | None:
    """Retry-After in seconds (RFC 9110 allows an HTTP date too; we send and honour seconds only)."""
    value = headers.get("Retry-After") if headers is not None else None
    if value is None:
        return None
    try:
        return max(0.0, float(value))
    except ValueError:
        return 1.0
