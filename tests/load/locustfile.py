"""Locust users for the load comparison (run by tests/load/run.py; see README.md "Load").

HotbasisClient: owns one ~2,000-row model (created before the measured phase) and PATCHes it again
and again with one new constraint that cuts off its current plan, reading back only what moved.
PeerClient: the same models and the same kind of new rows, but sends the whole changed model to the
stateless peer (tests/load/peer.py) each time and reads back the whole plan.

Settings (environment): LOAD_API_KEY (hotbasis bearer key), LOAD_ROWS (default 2000),
LOAD_SUMMARY (where to write the JSON summary of the measured phase).
"""

from __future__ import annotations

import itertools
import os
import threading
import time

import numpy as np
import orjson
from locust import FastHttpUser, constant, events, task

from tests.load.scenario import ClientModel, client_model

ROWS = int(os.environ.get("LOAD_ROWS", "2000"))
_numbers = itertools.count()
_lock = threading.Lock()
_records: list[tuple[float, float, bool, str]] = []  # (finished at, seconds, ok, kind)
_ready: list[float] = []


@events.quitting.add_listener
def _write_summary(environment, **_kwargs) -> None:
    path = os.environ.get("LOAD_SUMMARY")
    if not path:
        return
    users = environment.runner.user_count if environment.runner else 0
    start = max(_ready) if _ready else 0.0
    measured = [r for r in _records if r[0] >= start]
    end = max((r[0] for r in measured), default=start)
    ok = np.array([r[1] for r in measured if r[2]])
    summary = {
        "clients_ready": len(_ready),
        "users": users,
        "window_s": end - start,
        "changes_ok": int(ok.size),
        "errors": sum(1 for r in measured if not r[2]) + sum(1 for r in _records if r[3] == "setup-error"),
        "per_second": ok.size / (end - start) if end > start else 0.0,
        "p50_ms": float(np.percentile(ok, 50) * 1000) if ok.size else None,
        "p99_ms": float(np.percentile(ok, 99) * 1000) if ok.size else None,
        "mean_pivots": float(np.mean(_pivots)) if _pivots else None,
        "methods": dict(_methods),
    }
    with open(path, "wb") as fh:
        fh.write(orjson.dumps(summary, option=orjson.OPT_INDENT_2))


_pivots: list[int] = []
_methods: dict[str, int] = {}


def _note(seconds: float, ok: bool, kind: str) -> None:
    with _lock:
        _records.append((time.monotonic(), seconds, ok, kind))


class _ModelOwner(FastHttpUser):
    abstract = True
    wait_time = constant(0)  # closed loop: the next change as soon as the answer is in
    connection_timeout = 30.0
    network_timeout = 120.0

    def on_start(self) -> None:
        self.k = next(_numbers)
        self.model: ClientModel = client_model(self.k, ROWS)
        self.sequence = 0
        self.setup()
        with _lock:
            _ready.append(time.monotonic())

    def next_row(self):
        self.sequence += 1
        return self.model.cuts.cut(self.x, seed=self.k * 100_003 + self.sequence, sequence=self.sequence)


class HotbasisClient(_ModelOwner):
    def setup(self) -> None:
        self.auth = {"Authorization": f"Bearer {os.environ['LOAD_API_KEY']}"}
        with self.client.post(
            "/v1/models?fields=solution",
            data=self.model.document,
            headers={**self.auth, "Content-Type": "application/json"},
            name="create (not measured)",
            catch_response=True,
        ) as resp:
            if resp.status_code != 201:
                resp.failure(f"create: {resp.status_code} {resp.text[:300]}")
                _note(0.0, False, "setup-error")
                raise RuntimeError("could not create the model")
            body = orjson.loads(resp.content)
        self.url = f"/v1/models/{body['id']}"
        plan = body["solution"]["variables"]
        self.x = np.array([plan[name]["value"] for name in self.model.lp.col_names])

    @task
    def add_constraint(self) -> None:
        row = self.next_row()
        t = time.monotonic()
        with self.client.patch(
            f"{self.url}?fields=solution,solve&solution=moved",
            data=orjson.dumps(row.patch()),
            headers={**self.auth, "Content-Type": "application/merge-patch+json"},
            name="PATCH add constraint",
            catch_response=True,
        ) as resp:
            seconds = time.monotonic() - t
            if resp.status_code != 200:
                resp.failure(f"{resp.status_code} {resp.text[:300]}")
                _note(seconds, False, "change")
                return
            body = orjson.loads(resp.content)
            if body.get("solution") is None:
                resp.failure(f"no plan: status {body.get('status')}")
                _note(seconds, False, "change")
                return
            for name, var in body["solution"]["variables"].items():
                self.x[self.model.index[name]] = var["value"]
            with _lock:
                _pivots.append(body["solve"]["pivots"])
                method = body["solve"]["method"] + ("(fallback)" if body["solve"]["fallback"] else "")
                _methods[method] = _methods.get(method, 0) + 1
            _note(seconds, True, "change")


class PeerClient(_ModelOwner):
    def setup(self) -> None:
        doc = self.model.document
        assert doc.endswith(b"}}")  # the constraints map closes the document
        self.prefix, self.rows = doc[:-2], []
        self.x = self.solve(doc, "create (not measured)")
        if self.x is None:
            _note(0.0, False, "setup-error")
            raise RuntimeError("the peer could not solve the model")

    def solve(self, body: bytes, name: str) -> np.ndarray | None:
        with self.client.post(
            "/solve", data=body, headers={"Content-Type": "application/json"}, name=name, catch_response=True
        ) as resp:
            if resp.status_code != 200:
                resp.failure(f"{resp.status_code} {resp.text[:300]}")
                return None
            answer = orjson.loads(resp.content)
            if answer["x"] is None:
                resp.failure(f"no plan: {answer.get('message')}")
                return None
            return np.asarray(answer["x"])

    @task
    def add_constraint(self) -> None:
        row = self.next_row()
        self.rows.append(b"," + row.fragment())
        body = self.prefix + b"".join(self.rows) + b"}}"  # the whole changed model, every time
        t = time.monotonic()
        x = self.solve(body, "POST changed model")
        seconds = time.monotonic() - t
        if x is None:
            _note(seconds, False, "change")
            return
        self.x = x
        _note(seconds, True, "change")
