"""/v1/jobs: changes run by queue workers; the views of /v1/models hand work over through here.

A POST or PATCH goes to the queue when the client sends ``Prefer: respond-async``
(RFC 7240) or when the model is larger than the configured size
(HOTBASIS_ASYNC_ROWS, HOTBASIS_ASYNC_COLUMNS, HOTBASIS_ASYNC_NONZEROS; 0 turns a
limit off). Either way the request is validated completely first, so a bad
request still gets its 4xx now and nothing is queued.
"""

from __future__ import annotations

import os
from typing import Any

import orjson
from flask import Blueprint, Flask, Response, current_app, g, request, url_for

from service.api.auth import authenticate
from service.api.errors import ApiError
from service.api.schemas import EmptyQuery
from service.document import apply_patch
from service.jobs import JOB_TTL, Job, JobQueue, new_job_id, valid_job_id
from service.limits import check_model
from service.lp.model import LinearProgram
from service.operations import PreconditionFailed
from service.store import Head, model_id_for

bp = Blueprint("jobs", __name__, url_prefix="/v1")

# a model larger than any of these (stored model on PATCH, new model on POST) is handled as a job;
# the defaults keep the 10,000-row benchmark models synchronous
ASYNC_DEFAULTS = {"ASYNC_ROWS": 50_000, "ASYNC_COLUMNS": 250_000, "ASYNC_NONZEROS": 1_000_000}


@bp.before_request
def _authenticate() -> None:
    authenticate(current_app.extensions["hotbasis"].keyring)


def job_queue(app: Flask | None = None) -> JobQueue:
    """The app's JobQueue, on the same Redis client as the model store."""
    app = app or current_app._get_current_object()
    queue = app.extensions.get("hotbasis_jobs")
    if queue is None:
        ttl = int(app.config.get("JOB_TTL") or os.environ.get("HOTBASIS_JOB_TTL", JOB_TTL))
        queue = JobQueue(app.extensions["hotbasis"].service.store.r, ttl=ttl)
        app.extensions["hotbasis_jobs"] = queue
    return queue


def _limit(name: str) -> int:
    value = current_app.config.get(name)
    if value is None:
        value = os.environ.get(f"HOTBASIS_{name}", ASYNC_DEFAULTS[name])
    return int(value)


def too_big(lp: LinearProgram) -> bool:
    """Whether a model is over the size above which changes go to the workers."""
    for name, size in (("ASYNC_ROWS", lp.m), ("ASYNC_COLUMNS", lp.n), ("ASYNC_NONZEROS", lp.A.nnz)):
        limit = _limit(name)
        if limit > 0 and size > limit:
            return True
    return False


def prefers_async(header: str | None) -> bool:
    """RFC 7240: ``Prefer`` holds comma-separated preferences, each a token with optional parameters."""
    if not header:
        return False
    for part in header.split(","):
        token = part.split(";", 1)[0].split("=", 1)[0].strip().lower()
        if token == "respond-async":
            return True
    return False


def _view(query: dict[str, Any]) -> dict[str, Any]:
    return {
        "sections": list(query["sections"]),
        "solution": query["solution"],
        "changes_limit": query["changes_limit"],
    }


def _accepted(job: Job, preferred: bool) -> Response:
    body = job.as_json()
    resp = Response(orjson.dumps(body), status=202, mimetype="application/json")
    resp.headers["Location"] = url_for("jobs.get_job", job_id=job.id)
    resp.headers["Retry-After"] = "1"
    resp.headers["Vary"] = "Prefer"
    if preferred:  # absent when the job was chosen by the model's size alone
        resp.headers["Preference-Applied"] = "respond-async"
    g.model_id = job.model_id
    return resp


def defer_create(
    lp: LinearProgram, document: Any, query: dict[str, Any], idem_key: str | None
) -> Response | None:
    """Queue a validated create and answer 202, or None to create it now."""
    preferred = prefers_async(request.headers.get("Prefer"))
    if not preferred and not too_big(lp):
        return None
    check_model(lp, current_app.extensions["hotbasis"].service.limits(g.tenant))  # 413 now, not in a job
    from service.document import to_document

    job_id = new_job_id()
    # the model id is fixed now (from the Idempotency-Key when there is one, like a synchronous create),
    # so a job delivered twice finds the model its first delivery made
    model_key = idem_key or f"job:{job_id}"
    payload = {
        "document": document if document is not None else to_document(lp),
        "model_key": model_key,
        "cold_engine": query.get("cold_engine"),
        **_view(query),
    }
    job = job_queue().enqueue(g.tenant, "create", model_id_for(g.tenant, model_key), payload, job_id=job_id)
    return _accepted(job, preferred)


def defer_patch(head: Head, patch: Any, if_match: list[str] | None, query: dict[str, Any]) -> Response | None:
    """Queue a validated patch and answer 202, or None to apply it now.

    Raises what the synchronous path raises for a bad request (DocumentError,
    PreconditionFailed) before anything is queued.
    """
    preferred = prefers_async(request.headers.get("Prefer"))
    service = current_app.extensions["hotbasis"].service
    prior = service.record(head)  # usually the version cache's copy
    if not preferred and not too_big(prior.lp):
        return None
    if if_match is not None and "*" not in if_match and head.etag not in if_match:
        raise PreconditionFailed(head)
    # validation only (the worker applies the patch to the version current when it runs): 400 or 413 now
    new_lp, changes = apply_patch(prior.lp, patch)
    if not changes.empty():
        check_model(new_lp, service.limits(g.tenant))
    payload = {"patch": patch, "if_match": if_match, **_view(query)}
    job = job_queue().enqueue(g.tenant, "patch", head.model_id, payload)
    return _accepted(job, preferred)


@bp.get("/jobs/<job_id>")
def get_job(job_id: str) -> Response:
    EmptyQuery().load(request.args.to_dict())
    job = job_queue().get(job_id) if valid_job_id(job_id) else None
    if job is None or job.tenant != g.tenant:  # another tenant's job does not exist for you
        raise ApiError(404, "job-not-found", "Job not found", f"there is no job {job_id!r} for this key")
    resp = Response(orjson.dumps(job.as_json()), status=200, mimetype="application/json")
    if job.state in ("queued", "running"):
        resp.headers["Retry-After"] = "1"
    return resp
