"""The job queue on a real redis-server: records, stream entries, take-over of idle entries."""

from __future__ import annotations

import time

from service.jobs import GROUP, STREAM, JobQueue, valid_job_id


def test_enqueue_records_the_job_and_adds_one_entry(rclient):
    queue = JobQueue(rclient, ttl=600)
    job = queue.enqueue("acme", "patch", "m" * 16, {"patch": {"name": "x"}})
    assert valid_job_id(job.id)
    stored = queue.get(job.id)
    assert stored.state == "queued" and stored.tenant == "acme" and stored.attempts == 0
    assert queue.payload(job.id)["patch"] == {"name": "x"}
    assert rclient.xlen(STREAM) == 1
    assert 0 < rclient.ttl(f"{{hbj:{job.id}}}:job") <= 600
    stats = queue.stats()
    assert stats["depth"] == 1 and stats["waiting"] == 1 and stats["running"] == 0


def test_a_dead_consumers_entry_is_found_behind_many_live_ones(rclient):
    """XAUTOCLAIM scans ten pending entries per call: the cursor must move on, or entry 12 is never seen."""
    queue = JobQueue(rclient)
    ids = [queue.enqueue("acme", "patch", "m" * 16, {}).id for _ in range(12)]
    held = [queue.next("busy", 100, 60_000) for _ in range(12)]
    assert [d.job_id for d in held] == ids
    time.sleep(0.3)
    for delivery in held[:11]:  # the busy consumer heartbeats all but the last one
        queue.touch("busy", delivery.entry_id)
    taken = None
    for _ in range(3):
        taken = queue.next("rescuer", 50, 200)
        if taken is not None:
            break
    assert taken is not None and taken.job_id == ids[11]
    pending = rclient.xpending_range(STREAM, GROUP, "-", "+", 20, consumername="rescuer")
    assert [p["message_id"].decode() for p in pending] == [taken.entry_id]


def test_ack_removes_the_entry_and_finished_jobs_keep_their_result(rclient):
    queue = JobQueue(rclient)
    job = queue.enqueue("acme", "create", "m" * 16, {"document": {}})
    delivery = queue.next("w", 100, 60_000)
    assert queue.start(job.id, "w") == 1
    queue.finish(job.id, 1, 201, "/v1/models/" + "m" * 16, {"id": "m" * 16, "version": 1})
    queue.ack(delivery.entry_id)
    done = queue.get(job.id)
    assert done.state == "done" and done.result == {"id": "m" * 16, "version": 1} and done.status == 201
    assert queue.payload(job.id) is None  # the payload goes when the job ends
    assert rclient.xlen(STREAM) == 0 and rclient.xpending(STREAM, GROUP)["pending"] == 0
    assert queue.stats()["oldest_age_seconds"] is None
