"""Create and change models: validate, solve or re-optimize, commit by compare-and-set.

The same functions serve the HTTP views and (later) queue workers: they take
plain values and return records, and know nothing about Flask.
"""

from __future__ import annotations

import dataclasses
import logging
import random
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from service import lp as engine
from service.cache import VersionCache
from service.document import ChangeSet, apply_patch, name_index, to_document
from service.lp.basis import Basis
from service.lp.model import LinearProgram
from service.limits import LimitBook, Limits, check_model
from service.lp.result import SolveOptions, SolveResult
from service.metrics import observe_solve
from service.serialize import (
    change_report,
    moved_either,
    moved_indices,
    result_record,
    solution_of,
    summary_record,
)
from service.store import (
    AlreadyApplied,
    Head,
    ModelExists,
    ModelNotFound,
    Store,
    VersionConflict,
    VersionRecord,
    model_id_for,
    new_model_id,
)

log = logging.getLogger("hotbasis.operations")


class PreconditionFailed(Exception):
    """If-Match named a version that is no longer current."""

    def __init__(self, current: Head) -> None:
        super().__init__(f"the model is at version {current.version}")
        self.current = current


class TooMuchContention(Exception):
    """A change lost the compare-and-set race too many times in a row."""


@dataclass
class Outcome:
    head: Head
    record: VersionRecord
    created: bool = False  # a new version was stored by this call
    replayed: bool = False  # the operation id had been applied before; this is its stored version
    timings: dict[str, float] = field(default_factory=dict)  # seconds, by phase
    attempts: int = 1


def cache_id(head: Head) -> str:
    """The version cache's name for a model: its id and creation time. A model deleted and created
    again under the same id (an idempotent create) is another model, and another worker's cached
    versions of the old one must not answer for it; ``VersionCache.drop`` takes the bare id."""
    return f"{head.model_id}@{head.created_at!r}"


class ModelService:
    """Models of many tenants, kept in a Store, re-optimized by the engine."""

    def __init__(
        self,
        store: Store,
        cache: VersionCache,
        options: SolveOptions | None = None,
        max_attempts: int = 64,
        limits: Callable[[str], Limits] | None = None,
    ) -> None:
        self.store = store
        self.cache = cache
        self.options = options or SolveOptions()
        self.max_attempts = max_attempts
        self.limits = limits or LimitBook(Limits())  # tenant -> its limits

    # ---------------------------------------------------------------- reading
    def head(self, tenant: str, model_id: str) -> Head:
        head = self.store.head(model_id)
        if head is None or head.tenant != tenant:  # another tenant's model does not exist for you
            raise ModelNotFound(model_id)
        return head

    def record(self, head: Head, version: int | None = None) -> VersionRecord:
        version = head.version if version is None else version
        cached = self.cache.get(cache_id(head), version)
        if cached is not None:
            return cached.record
        rec = self.store.load(head.model_id, version)
        if rec is None:
            raise ModelNotFound(f"{head.model_id} version {version}")
        self.cache.put(cache_id(head), version, rec)
        return rec

    # ---------------------------------------------------------------- creating
    def create(
        self,
        tenant: str,
        lp: LinearProgram,
        op_id: str | None = None,
        idem_key: str | None = None,
        cold_engine: str | None = None,
    ) -> Outcome:
        """Cold-solve a new model and store it as version 1.

        ``cold_engine`` ("highs" or "builtin"; default: the service's) solves this model's cold
        solves, now and whenever it must be re-solved cold later; it is kept in the model's head.

        With an idempotency key the id is derived from (tenant, key), so a
        retry after a crash finds the model instead of making a second one.
        """
        timings: dict[str, float] = {}
        check_model(lp, self.limits(tenant))
        model_id = model_id_for(tenant, idem_key) if idem_key else new_model_id()
        if idem_key:
            existing = self.store.head(model_id)
            if existing is not None and existing.tenant == tenant:
                return Outcome(existing, self.record(existing, existing.first_version), replayed=True)
        t = time.perf_counter()
        cold_engine = cold_engine or self.options.engine
        res = self._cold(lp, reason="new model", cold_engine=cold_engine)
        timings["solve"] = time.perf_counter() - t
        rec = self._record(lp, res, res.basis, changes=None, moved_from=None)
        rec.result["solve"]["cold_engine"] = cold_engine
        t = time.perf_counter()
        for _ in range(3):
            try:
                head = self.store.create(model_id, tenant, rec, op_id=op_id, cold_engine=cold_engine)
                break
            except ModelExists:
                if idem_key:
                    existing = self.store.head(model_id)
                    if existing is not None:
                        return Outcome(existing, self.record(existing, existing.first_version), replayed=True)
                model_id = new_model_id()
        else:  # pragma: no cover - 80 random bits colliding three times
            raise ModelExists(model_id)
        timings["store"] = time.perf_counter() - t
        # the name -> position maps the first PATCH needs (then carried from version to
        # version): built here, where a cold solve is paid anyway, not in the first change
        name_index(rec.lp, "col_names")
        name_index(rec.lp, "row_names")
        self.cache.put(cache_id(head), 1, rec, engine_state=getattr(res, "state", None))
        observe_solve(rec.result["solve"])
        return Outcome(head, rec, created=True, timings=timings)

    # ---------------------------------------------------------------- changing
    def patch(
        self,
        tenant: str,
        model_id: str,
        patch: Any,
        if_match: list[str] | None = None,
        op_id: str | None = None,
        extra: dict[str, Any] | None = None,
        head: Head | None = None,
    ) -> Outcome:
        """Apply a merge patch on the latest version, re-optimize warm, commit as the next version.

        ``patch`` may be a callable of the latest version's record that returns
        the patch (re-run on each retry, for changes stated against a target
        rather than as a delta); ``extra`` fields are stored in the result and
        the version summary.

        Without ``if_match`` a lost race is retried on the newer version, so
        concurrent changes are serialized and none is lost. With ``if_match``
        (a list of acceptable ETags, or ["*"]) a stale version raises
        PreconditionFailed instead. An invalid patch raises DocumentError
        before anything is stored. ``head``: the caller's just-read head of the
        model, used for the first attempt instead of reading it again.
        """
        timings: dict[str, float] = {}
        # the caller's fresh read of the head can serve the first attempt (one Redis read fewer); not
        # under If-Match, which must be judged against the head as read here
        usable = head is not None and if_match is None and head.tenant == tenant and head.model_id == model_id
        known = head if usable else None
        for attempt in range(1, self.max_attempts + 1):
            t = time.perf_counter()
            head = known if attempt == 1 and known is not None else self.head(tenant, model_id)
            if op_id:
                done = self.store.op_version(model_id, op_id)
                if done is not None:
                    return self._replay(head, done)
            if if_match is not None and "*" not in if_match and head.etag not in if_match:
                raise PreconditionFailed(head)
            cached = self.cache.get(cache_id(head), head.version)
            if cached is not None:
                prior, state = cached.record, cached.engine_state
            else:
                try:
                    prior, state = self.record(head), None
                except ModelNotFound:  # pruned by newer commits since the head was read: read again
                    continue
            timings["load"] = timings.get("load", 0.0) + time.perf_counter() - t

            t = time.perf_counter()
            new_lp, changes = apply_patch(prior.lp, patch(prior) if callable(patch) else patch)
            timings["patch"] = timings.get("patch", 0.0) + time.perf_counter() - t
            if changes.empty():
                return Outcome(head, prior, timings=timings, attempts=attempt)
            check_model(new_lp, self.limits(tenant))

            t = time.perf_counter()
            cold_engine = head.cold_engine or self.options.engine
            res, start_basis = self._reoptimize(prior, new_lp, changes, state, cold_engine=cold_engine)
            timings["solve"] = timings.get("solve", 0.0) + time.perf_counter() - t

            t = time.perf_counter()
            rec = self._record(
                new_lp,
                res,
                res.basis if res.basis is not None else start_basis,
                changes=changes,
                moved_from=prior,
            )
            rec.result["solve"]["cold_engine"] = cold_engine
            if extra:
                rec.result.update(extra)
                rec.summary["changes"] = {**(rec.summary["changes"] or {}), **extra}
            try:
                new_head = self.store.commit(
                    model_id, head.version, rec, op_id=op_id, prior=prior, created_at=head.created_at
                )
            except VersionConflict:
                timings["store"] = timings.get("store", 0.0) + time.perf_counter() - t
                if if_match is not None and "*" not in if_match:
                    raise PreconditionFailed(self.head(tenant, model_id)) from None
                time.sleep(random.uniform(0.0, 0.002 * min(attempt, 10)))  # de-synchronize the racers
                continue
            except AlreadyApplied as done:
                return self._replay(head, done.version)
            timings["store"] = timings.get("store", 0.0) + time.perf_counter() - t
            self.cache.put(cache_id(new_head), new_head.version, rec, engine_state=getattr(res, "state", None))
            observe_solve(rec.result["solve"])  # counted once, for the solve that was stored
            return Outcome(new_head, rec, created=True, timings=timings, attempts=attempt)
        raise TooMuchContention(f"gave up after {self.max_attempts} attempts")

    def restore(
        self,
        tenant: str,
        model_id: str,
        version: int,
        if_match: list[str] | None = None,
        op_id: str | None = None,
    ) -> Outcome:
        """A new version whose document equals kept version ``version``.

        The difference from the latest version is applied as a merge patch, so
        the re-optimization is warm from the latest basis, exactly as a PATCH.
        Raises ModelNotFound for a version that is not kept.
        """
        head = self.head(tenant, model_id)
        if not head.first_version <= version <= head.version:
            raise ModelNotFound(f"{model_id} version {version}")
        target = to_document(self.record(head, version).lp)
        return self.patch(
            tenant,
            model_id,
            lambda prior: document_diff(to_document(prior.lp), target),
            if_match=if_match,
            op_id=op_id,
            extra={"restored_from": version},
        )

    def delete(self, tenant: str, model_id: str) -> None:
        self.head(tenant, model_id)
        self.store.delete(model_id)
        self.cache.drop(model_id)

    # ---------------------------------------------------------------- internals
    def _replay(self, head: Head, version: int) -> Outcome:
        """The stored answer of an operation applied before (a retry after a lost response)."""
        current = self.store.head(head.model_id) or head
        return Outcome(current, self.record(current, version), replayed=True)

    def _cold(
        self, lp: LinearProgram, reason: str, fallback: dict | None = None, cold_engine: str | None = None
    ) -> SolveResult:
        options = self.options
        if cold_engine and cold_engine != options.engine:
            options = dataclasses.replace(options, engine=cold_engine)
        res = engine.solve(lp, options)
        if res.state is None and res.status == "optimal":
            # HiGHS hands back a basis but no factorization: build one now, so the
            # model's first change skips scaling and refactorizing
            res.state = engine.warm_state(lp, res.basis, self.options)
        if fallback is not None:
            res.fallback = fallback
            res.reason = f"cold solve: {fallback['reason']}"
        elif not res.reason:
            res.reason = f"cold solve of a {reason}"
        return res

    def _reoptimize(
        self,
        prior: VersionRecord,
        new_lp: LinearProgram,
        changes: ChangeSet,
        state: Any = None,
        cold_engine: str | None = None,
    ) -> tuple[SolveResult, Basis | None]:
        """Warm re-optimization from the stored basis carried over by name; cold if there is none.

        Warm solves always run the builtin simplex, and the engine's own fallback after warm trouble
        is always HiGHS; only a cold re-solve (no usable stored basis) uses the model's ``cold_engine``.

        ``state`` is the engine's in-process warm state of the prior version (from the version
        cache): the engine reuses its scaling and factorization when the change allows it.
        """
        basis = prior.basis
        if basis is None or basis.n != prior.lp.n or basis.m != prior.lp.m:
            fallback = {"reason": "no_stored_basis"}
            return self._cold(new_lp, "changed model", fallback=fallback, cold_engine=cold_engine), None
        # the fast patch path knows the new -> old index maps; otherwise match names
        start, _report = engine.remap(
            basis, prior.lp.col_names, prior.lp.row_names, new_lp, changes.col_source, changes.row_source
        )
        try:
            res = engine.reoptimize(
                new_lp, start, self.options, change_summary=describe(changes), state=state
            )
        except Exception as exc:  # the engine failed outright: answer with a cold solve, and say so
            log.exception("warm re-optimization raised; solving cold")
            res = self._cold(  # a fallback: HiGHS, whatever the model's cold engine
                new_lp,
                "changed model",
                fallback={"reason": "engine_error", "detail": str(exc)[:300]},
                cold_engine="highs",
            )
        return res, start

    def _record(
        self,
        lp: LinearProgram,
        res: SolveResult,
        basis: Basis | None,
        changes: ChangeSet | None,
        moved_from: VersionRecord | None,
    ) -> VersionRecord:
        now = time.time()
        sol = solution_of(res)
        objective = None if res.objective is None else float(res.objective)
        if moved_from is None:
            report = None
            moved_cols = moved_indices(sol.x, None)
            moved_rows = moved_either(
                moved_indices(sol.row_activity, None), moved_indices(sol.shadow_price, None), lp.m
            )
        else:
            report, moved_cols, moved_rows = change_report(
                moved_from, lp, sol, objective, changes.summary(), changes.col_source, changes.row_source
            )
        result = result_record(res, lp, report)
        change_kind = (
            None
            if changes is None
            else {
                "kind": changes.kind(),
                **changes.counts(),
                "sense": changes.sense,
                "objective_offset": changes.objective_offset,
                "name": changes.name,
            }
        )
        return VersionRecord(
            version=0,  # numbered by the store at commit
            lp=lp,
            basis=basis,
            solution=sol,
            result=result,
            summary=summary_record(0, now, result, change_kind),
            created_at=now,
            moved_cols=moved_cols,
            moved_rows=moved_rows,
        )


def document_diff(current: dict[str, Any], target: dict[str, Any]) -> dict[str, Any]:
    """A merge patch turning document ``current`` into ``target`` (both from ``to_document``).

    Changed entries are sent whole (every field explicit; a term the target
    lacks as null), because on bounds a patch's null means "unbounded", never
    "keep the old value".
    """
    patch: dict[str, Any] = {}
    for key in ("name", "sense", "objective_offset"):
        if current.get(key) != target.get(key):
            patch[key] = target.get(key)
    for section in ("variables", "constraints"):
        old, new = current[section], target[section]
        part: dict[str, Any] = {name: None for name in old if name not in new}
        for name, entry in new.items():
            if old.get(name) == entry:
                continue
            entry = dict(entry)
            if "terms" in entry:
                dropped = {v: None for v in (old.get(name) or {}).get("terms", {}) if v not in entry["terms"]}
                entry["terms"] = {**entry["terms"], **dropped}
            part[name] = entry
        if part:
            patch[section] = part
    return patch


def describe(changes: ChangeSet) -> str:
    """A short phrase for the solve's reason: what the patch did."""
    parts = []
    labels = {
        "rows_added": "constraint(s) added",
        "rows_removed": "constraint(s) removed",
        "columns_added": "variable(s) added",
        "columns_removed": "variable(s) removed",
        "row_bounds": "constraint bound(s) moved",
        "column_bounds": "variable bound(s) moved",
        "costs": "cost(s) changed",
        "coefficients": "constraint(s) with new coefficients",
    }
    for key, label in labels.items():
        count = len(getattr(changes, key))
        if count:
            parts.append(f"{count} {label}")
    if changes.sense:
        parts.append("objective sense flipped")
    if changes.objective_offset:
        parts.append("objective offset changed")
    if changes.name and not parts:
        parts.append("renamed")
    return "warm start from the stored basis after: " + ", ".join(parts)
