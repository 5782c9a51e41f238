"""The Redis store against a real throwaway redis-server: encodings, CAS, history, idempotency."""

from __future__ import annotations

import threading
import time

import numpy as np
import orjson
import pytest
from conftest import snapshot

from service.document import apply_patch, from_document
from service.lp.basis import Basis
from service.store import (
    AlreadyApplied,
    ModelExists,
    ModelNotFound,
    Solution,
    Store,
    VersionConflict,
    VersionRecord,
    decode_lp,
    encode_lp,
    model_id_for,
    new_model_id,
    valid_model_id,
)

DOC = {
    "name": "kiln line",
    "sense": "max",
    "objective_offset": 2.5,
    "variables": {"tiles": {"cost": 3, "upper": 10}, "bricks": {"cost": 2, "lower": None}, "glaze/µ": {}},
    "constraints": {
        "kiln": {"terms": {"tiles": 1, "bricks": 1}, "upper": 12},
        "clay": {"terms": {"bricks": 2}},
    },
}


def record(lp, version=1, note="") -> VersionRecord:
    x = np.arange(lp.n, dtype=float)
    return VersionRecord(
        version=version,
        lp=lp,
        basis=Basis(np.zeros(lp.n, dtype=np.int8) + 1, np.zeros(lp.m, dtype=np.int8)),
        solution=Solution(x, lp.A @ x, np.ones(lp.m), None),
        result={"status": "optimal", "objective": 1.5, "note": note},
        summary={"version": version, "note": note},
        moved_cols=np.array([0, 2], dtype=np.int32),
    )


@pytest.fixture
def store(rclient):
    return Store(rclient, keep_versions=3)


def test_lp_encoding_round_trips_exactly():
    lp = from_document(DOC)
    back = decode_lp({k.encode(): v for k, v in encode_lp(lp).items()})
    assert back.col_names == lp.col_names and back.row_names == lp.row_names
    assert back.name == "kiln line" and back.sense == lp.sense and back.offset == 2.5
    for name in ("c", "col_lower", "col_upper", "row_lower", "row_upper"):
        np.testing.assert_array_equal(getattr(back, name), getattr(lp, name))
    assert (back.A != lp.A).nnz == 0
    assert back.c.flags.writeable  # the engine may work in place on what we hand it


def test_encoding_is_raw_buffers_not_pickle(store, rclient):
    lp = from_document(DOC)
    store.create("aaaaaaaaaaaaaaaa", "acme", record(lp))
    raw = rclient.hgetall("{hb:aaaaaaaaaaaaaaaa}:v:1")
    # the model's large arrays are content-addressed blobs the version refers to
    costs = rclient.get(b"{hb:aaaaaaaaaaaaaaaa}:blob:" + raw[b"ref.lp.c"])
    assert costs == np.array([3, 2, 0], dtype="<f8").tobytes()
    assert raw[b"basis"][:4] == b"HBB1"
    blobs = [rclient.get(k) for k in rclient.keys("{hb:aaaaaaaaaaaaaaaa}:blob:*")]
    assert all(not value.startswith(b"\x80") for value in [*raw.values(), *blobs])  # pickle 2+ marker


def test_create_load_and_keys_share_one_hash_tag(store, rclient):
    lp = from_document(DOC)
    mid = new_model_id()
    assert valid_model_id(mid)
    head = store.create(mid, "acme", record(lp))
    assert head.version == 1 and head.etag == '"v1"'
    loaded = store.load(mid, 1)
    assert loaded.result["objective"] == 1.5 and loaded.lp.col_names[2] == "glaze/µ"
    np.testing.assert_array_equal(loaded.solution.x, [0, 1, 2])
    assert loaded.solution.reduced_cost is None
    np.testing.assert_array_equal(loaded.basis.col_status, [1, 1, 1])
    np.testing.assert_array_equal(loaded.moved_cols, [0, 2])
    model_keys = [k for k in rclient.keys("*") if b"hbt:" not in k]
    # every key of the model carries the same hash tag, so Redis Cluster puts them in one slot
    assert {k.split(b"}")[0] for k in model_keys} == {b"{hb:" + mid.encode()}
    with pytest.raises(ModelExists):
        store.create(mid, "acme", record(lp))


def test_commit_is_compare_and_set_and_keeps_recent_versions(store):
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    for n in range(2, 6):
        head = store.commit(mid, n - 1, record(lp, note=f"v{n}"))
        assert head.version == n
    with pytest.raises(VersionConflict) as info:
        store.commit(mid, 3, record(lp))
    assert info.value.current == 5
    head = store.head(mid)
    assert (head.first_version, head.version) == (3, 5)  # keep_versions=3
    assert store.load(mid, 2) is None and store.load(mid, 3).result["note"] == "v3"
    assert [s["version"] for s in store.summaries(head)] == [3, 4, 5]
    with pytest.raises(ModelNotFound):
        store.commit("bbbbbbbbbbbbbbbb", 1, record(lp))


def test_an_operation_id_commits_once(store):
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    store.commit(mid, 1, record(lp), op_id="job-7")
    with pytest.raises(AlreadyApplied) as info:
        store.commit(mid, 2, record(lp), op_id="job-7")
    assert info.value.version == 2 and store.head(mid).version == 2
    assert store.op_version(mid, "job-7") == 2


def test_concurrent_commits_never_overwrite_each_other(store):
    """Each thread re-reads and retries on conflict; every change ends up in its own version."""
    base = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(base))
    errors = []

    def worker(k: int) -> None:
        try:
            for _ in range(200):
                head = store.head(mid)
                current = store.load(mid, head.version)
                if current is None:  # pruned by the other threads' commits since the head was read
                    continue
                new_lp, _ = apply_patch(
                    current.lp, {"constraints": {f"limit_{k}": {"terms": {"tiles": 1}, "upper": k}}}
                )
                try:
                    store.commit(mid, head.version, record(new_lp))
                    return
                except VersionConflict:
                    continue
            errors.append(f"thread {k} gave up")
        except Exception as exc:  # surfaced below; a thread must not die silently
            errors.append(repr(exc))

    threads = [
        threading.Thread(target=worker, args=(k,)) for k in range(6)
    ]  # keep_versions=3: prunes race reads
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    head = store.head(mid)
    assert head.version == 7
    final = store.load(mid, 7).lp
    assert {f"limit_{k}" for k in range(6)} <= set(final.row_names)


def test_delete_removes_every_key(store, rclient):
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    store.commit(mid, 1, record(lp), op_id="x")
    before = snapshot(rclient)
    assert before
    assert store.delete(mid) is True
    assert snapshot(rclient) == {}
    assert store.delete(mid) is False


def test_list_models_is_per_tenant_and_paginated(store):
    lp = from_document(DOC)
    ids = [new_model_id() for _ in range(5)]
    for mid in ids:
        store.create(mid, "acme", record(lp))
    store.create(new_model_id(), "globex", record(lp))
    page, total = store.list_models("acme", 0, 3)
    assert total == 5 and [h.model_id for h in page] == ids[:3]
    page, _ = store.list_models("acme", 3, 3)
    assert [h.model_id for h in page] == ids[3:]


def test_idempotency_records(store):
    assert store.idem_begin("acme", "key-1", "fp") is None
    pending = store.idem_begin("acme", "key-1", "fp")
    assert pending["state"] == "pending"
    store.idem_finish("acme", "key-1", "fp", 201, {"ETag": '"v1"'}, b'{"ok": true}')
    done = store.idem_begin("acme", "key-1", "fp")
    assert done["state"] == "done" and done["status"] == 201 and done["body"] == b'{"ok": true}'
    assert store.idem_begin("globex", "key-1", "fp") is None  # keys are per tenant
    store.idem_abort("globex", "key-1")
    assert store.idem_begin("globex", "key-1", "fp") is None
    assert model_id_for("acme", "k") == model_id_for("acme", "k") != model_id_for("globex", "k")
    assert valid_model_id(model_id_for("acme", "k"))


def _blob_keys(rclient, mid: str) -> set[bytes]:
    return set(rclient.keys(f"{{hb:{mid}}}:blob:*"))


def _expected_refcounts(rclient, store, mid: str) -> dict[bytes, int]:
    head = store.head(mid)
    counts: dict[bytes, int] = {}
    for n in range(head.first_version, head.version + 1):
        raw = rclient.hgetall(f"{{hb:{mid}}}:v:{n}")
        for digest in {d for k, v in raw.items() if k.startswith(b"ref.") for d in v.split(b",") if d}:
            counts[digest] = counts.get(digest, 0) + 1
    return counts


def test_versions_share_the_arrays_that_did_not_change(store, rclient):
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    before = _blob_keys(rclient, mid)
    moved = lp.copy()
    moved.row_upper[0] = 11.0  # one right-hand side moves; every other array stays
    store.commit(mid, 1, record(moved))
    added = _blob_keys(rclient, mid) - before
    assert len(added) == 1  # only lp.row_upper was written again
    refs = {k: int(v) for k, v in rclient.hgetall(f"{{hb:{mid}}}:blobrefs").items()}
    assert refs == _expected_refcounts(rclient, store, mid)
    np.testing.assert_array_equal(store.load(mid, 1).lp.row_upper, lp.row_upper)
    np.testing.assert_array_equal(store.load(mid, 2).lp.row_upper, moved.row_upper)


def test_pruned_versions_release_their_blobs(store, rclient):
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    for n in range(2, 9):  # keep_versions=3: versions 1-5 are pruned on the way
        changed = lp.copy()
        changed.c = lp.c + n  # new costs each time: a new blob per version
        store.commit(mid, n - 1, record(changed))
    counts = _expected_refcounts(rclient, store, mid)
    stored = {k: int(v) for k, v in rclient.hgetall(f"{{hb:{mid}}}:blobrefs").items()}
    assert stored == counts
    # exactly the blobs the kept versions refer to, no orphans
    assert {k.rsplit(b":", 1)[1] for k in _blob_keys(rclient, mid)} == set(counts)
    assert store.load(mid, 8).lp.c.tolist() == (lp.c + 8).tolist()


def test_delete_removes_every_key_of_the_model(store, rclient):
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    store.commit(mid, 1, record(lp, note="again"))
    assert store.delete(mid)
    assert rclient.keys(f"{{hb:{mid}}}*") == []


def _wide_lp(rows: int, cols: int, seed: int = 3):
    """A model larger than the storage pieces (ROW_PIECE rows, COL_PIECE columns)."""
    import scipy.sparse as sp

    from service.lp import LinearProgram

    rng = np.random.default_rng(seed)
    A = sp.random(rows, cols, density=4.0 / cols, random_state=rng, format="csc")
    return LinearProgram(
        A=A,
        c=rng.normal(size=cols),
        col_lower=np.zeros(cols),
        col_upper=np.where(rng.random(cols) < 0.5, np.inf, 5.0),
        row_lower=np.full(rows, -np.inf),
        row_upper=rng.random(rows) * 10,
        col_names=[f"x{j}" for j in range(cols)],
        row_names=[f"r{i}" for i in range(rows)],
    )


def test_piecewise_encoding_round_trips_a_model_larger_than_the_pieces(store):
    from service.store import COL_PIECE, ROW_PIECE

    lp = _wide_lp(2 * ROW_PIECE + 17, 3 * COL_PIECE + 5)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    back = store.load(mid, 1)
    assert (back.lp.A != lp.A).nnz == 0 and back.lp.A.shape == lp.A.shape
    assert back.lp.col_names == lp.col_names and back.lp.row_names == lp.row_names
    for name in ("c", "col_lower", "col_upper", "row_lower", "row_upper"):
        np.testing.assert_array_equal(getattr(back.lp, name), getattr(lp, name))
    np.testing.assert_array_equal(back.solution.x, np.arange(lp.n, dtype=float))
    np.testing.assert_array_equal(back.solution.row_activity, lp.A @ np.arange(lp.n, dtype=float))


def test_an_appended_constraint_writes_only_the_last_row_pieces(store, rclient):
    """The common change (one new row) must not rewrite the whole matrix, costs or names."""
    import scipy.sparse as sp

    from service.store import ROW_PIECE

    lp = _wide_lp(3 * ROW_PIECE + 10, 2500)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    before = _blob_keys(rclient, mid)
    grown = lp.copy()
    grown.A = sp.vstack(
        [lp.A, sp.csr_matrix(([1.0, 2.0], ([0, 0], [3, 900])), shape=(1, lp.n))], format="csc"
    )
    grown.row_lower = np.append(lp.row_lower, -np.inf)
    grown.row_upper = np.append(lp.row_upper, 4.0)
    grown.row_names = [*lp.row_names, "new lane cap"]
    store.commit(mid, 1, record(grown))
    added = _blob_keys(rclient, mid) - before
    # the last row piece of: the matrix, both row bounds, the row names, the shadow prices (the
    # columns' costs, bounds, names and values are shared with version 1; the activities are A x,
    # recomputed when read, not stored)
    assert len(added) == 5
    assert sum(len(rclient.get(k)) for k in added) < 0.1 * sum(len(rclient.get(k)) for k in before)
    back = store.load(mid, 2).lp
    assert (back.A != grown.A).nnz == 0 and back.row_names[-1] == "new lane cap"
    assert store.load(mid, 1).lp.m == lp.m  # the older version is intact


def test_versions_written_in_the_whole_array_layout_still_load(store, rclient):
    """Stores written before the piecewise layout kept one blob per array and the plan inline."""
    import hashlib

    lp = _wide_lp(40, 30)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))  # a head and version 1 in the current layout
    A = lp.A.tocsc()
    whole = {
        "lp.indptr": A.indptr.astype("<i8").tobytes(),
        "lp.indices": A.indices.astype("<i4").tobytes(),
        "lp.data": A.data.astype("<f8").tobytes(),
        "lp.c": lp.c.astype("<f8").tobytes(),
        "lp.col_lower": lp.col_lower.astype("<f8").tobytes(),
        "lp.col_upper": lp.col_upper.astype("<f8").tobytes(),
        "lp.row_lower": lp.row_lower.astype("<f8").tobytes(),
        "lp.row_upper": lp.row_upper.astype("<f8").tobytes(),
        "lp.col_names": "\n".join(lp.col_names).encode(),
        "lp.row_names": "\n".join(lp.row_names).encode(),
    }
    fields = {
        "lp.meta": orjson.dumps(
            {"m": lp.m, "n": lp.n, "nnz": int(A.nnz), "sense": 1, "offset": 0.0, "name": ""}
        ),
        "sol.x": np.arange(lp.n, dtype="<f8").tobytes(),
        "result": orjson.dumps({"status": "optimal"}),
        "summary": orjson.dumps({"version": 1}),
        "created_at": b"1.0",
        "version": b"1",
    }
    for name, data in whole.items():
        digest = hashlib.blake2b(data, digest_size=16).hexdigest()
        rclient.set(f"{{hb:{mid}}}:blob:{digest}", data)
        fields["ref." + name] = digest.encode()
    rclient.delete(f"{{hb:{mid}}}:v:1")
    rclient.hset(f"{{hb:{mid}}}:v:1", mapping=fields)
    back = store.load(mid, 1)
    assert (back.lp.A != lp.A).nnz == 0 and back.lp.row_names == lp.row_names
    np.testing.assert_array_equal(back.lp.row_upper, lp.row_upper)
    np.testing.assert_array_equal(back.solution.x, np.arange(lp.n, dtype=float))


def test_a_refused_commit_changes_nothing_stored(store, rclient):
    """The commit script checks everything before its first write: a stale version, an operation
    applied before and a vanished model leave Redis byte for byte as they were."""
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    store.commit(mid, 1, record(lp), op_id="job-1")
    changed = lp.copy()
    changed.c = lp.c + 1.0  # new blobs that a refused commit must not leave behind
    before = snapshot(rclient)
    with pytest.raises(VersionConflict):
        store.commit(mid, 1, record(changed))
    with pytest.raises(AlreadyApplied):
        store.commit(mid, 2, record(changed), op_id="job-1")
    with pytest.raises(ModelNotFound):
        store.commit(new_model_id(), 1, record(changed))
    assert snapshot(rclient) == before


def _sent_bytes(rclient, call) -> int:
    """Bytes Redis received while ``call`` ran (its own counter)."""
    before = rclient.info("stats")["total_net_input_bytes"]
    call()
    return rclient.info("stats")["total_net_input_bytes"] - before


def test_a_commit_sends_only_the_pieces_its_previous_version_lacks(store, rclient):
    lp = _wide_lp(600, 3000)
    mid = new_model_id()
    first = record(lp)
    store.create(mid, "acme", first)
    store.commit(mid, 1, record(lp, note="again"))
    second = store.load(mid, 2)
    moved = lp.copy()
    moved.row_upper[0] += 1.0  # one row piece of the right-hand sides changes
    full = _sent_bytes(rclient, lambda: store.commit(mid, 2, record(moved)))
    lean = _sent_bytes(rclient, lambda: store.commit(mid, 3, record(moved), prior=second))
    assert lean < 0.1 * full  # without the previous digests every piece travels
    assert {k: int(v) for k, v in rclient.hgetall(f"{{hb:{mid}}}:blobrefs").items()} == _expected_refcounts(
        rclient, store, mid
    )
    np.testing.assert_array_equal(store.load(mid, 4).lp.row_upper, moved.row_upper)


def test_digests_claimed_but_not_held_are_asked_for_and_sent(store, rclient):
    """A caller's idea of what the store holds can be stale (its cached version was pruned by
    another process): the script names the missing blobs and the commit sends them."""
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    changed = lp.copy()
    changed.c = lp.c * 3.0
    claimed = store.load(mid, 1)
    import service.store as st

    fields, _ = st.split_blobs(st.encode_record(record(changed)))
    claimed.digests["lp.c"] = st.ref_digests(fields["ref.lp.c"])  # claims the new costs' blob is held
    claimed.lp.c = changed.c.copy()  # and that the previous version had these costs
    store.commit(mid, 1, record(changed), prior=claimed)
    np.testing.assert_array_equal(store.load(mid, 2).lp.c, changed.c)
    assert {k: int(v) for k, v in rclient.hgetall(f"{{hb:{mid}}}:blobrefs").items()} == _expected_refcounts(
        rclient, store, mid
    )


def test_a_blob_used_twice_by_one_version_is_counted_once_and_released_on_prune(store, rclient):
    lp = from_document(DOC)
    lp.c[:] = 0.0  # costs equal to the lower bounds: one blob for two fields
    lp.col_lower[:] = 0.0
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    for n in range(2, 7):  # keep_versions=3: versions 1-3 are pruned
        changed = lp.copy()
        changed.row_upper = lp.row_upper + n
        store.commit(mid, n - 1, record(changed), prior=store.load(mid, n - 1))
    stored = {k: int(v) for k, v in rclient.hgetall(f"{{hb:{mid}}}:blobrefs").items()}
    assert stored == _expected_refcounts(rclient, store, mid)
    assert {k.rsplit(b":", 1)[1] for k in _blob_keys(rclient, mid)} == set(stored)
    np.testing.assert_array_equal(store.load(mid, 6).lp.c, lp.c)


def _changes_of(lp):
    """Changes of every kind on a model larger than the pieces, each a new LinearProgram."""
    import scipy.sparse as sp

    from service.store import ROW_PIECE

    def appended(base, k):
        grown = base.copy()
        rows = sp.csr_matrix((np.arange(1.0, 2 * k + 1), (np.repeat(np.arange(k), 2), np.arange(2 * k) * 7 % base.n)),
                             shape=(k, base.n))  # fmt: skip
        grown.A = sp.vstack([base.A, rows], format="csc")
        grown.row_lower = np.append(base.row_lower, np.full(k, -np.inf))
        grown.row_upper = np.append(base.row_upper, np.arange(k) + 3.0)
        grown.row_names = [*base.row_names, *(f"cut{base.m + i}" for i in range(k))]
        return grown

    out = [appended(lp, 1), appended(lp, ROW_PIECE + 3)]
    coef = lp.copy()
    coef.A = lp.A.copy()
    coef.A.data[5] *= 2.0  # one coefficient in an early row block
    out.append(coef)
    cost = lp.copy()
    cost.c = lp.c.copy()
    cost.c[-1] = -0.0  # was 0.0: equal as numbers, another byte string
    out.append(cost)
    fewer = lp.copy()
    keep = np.arange(lp.m) != 3  # a removed row shifts every later row
    fewer.A = lp.A[keep].tocsc()
    fewer.row_lower, fewer.row_upper = lp.row_lower[keep], lp.row_upper[keep]
    fewer.row_names = [nm for i, nm in enumerate(lp.row_names) if keep[i]]
    out.append(fewer)
    wider = lp.copy()
    wider.A = sp.hstack([lp.A, sp.csc_matrix((lp.m, 1))], format="csc")
    for name, value in (("c", 1.0), ("col_lower", 0.0), ("col_upper", np.inf)):
        setattr(wider, name, np.append(getattr(lp, name), value))
    wider.col_names = [*lp.col_names, "new lane"]
    out.append(wider)
    return out


def test_pieces_carried_from_the_previous_version_store_what_a_full_encoding_stores(store, rclient):
    """Naming the previous version's pieces instead of encoding them is only a shortcut: every
    kind of change leaves exactly the digests (hence bytes) a from-scratch encoding gives."""
    from service.store import ROW_PIECE

    lp = _wide_lp(2 * ROW_PIECE + 40, 2100)
    lp.c[-1] = 0.0
    for changed in _changes_of(lp):
        carried, full = new_model_id(), new_model_id()
        for mid in (carried, full):
            store.create(mid, "acme", record(lp))
        store.commit(carried, 1, record(changed), prior=store.load(carried, 1))
        store.commit(full, 1, record(changed))
        refs = [
            {k: v for k, v in rclient.hgetall(f"{{hb:{mid}}}:v:2").items() if k.startswith(b"ref.")}
            for mid in (carried, full)
        ]
        assert refs[0] == refs[1]
        back = store.load(carried, 2)
        assert (back.lp.A != changed.A).nnz == 0 and back.lp.row_names == changed.row_names
        np.testing.assert_array_equal(np.signbit(back.lp.c), np.signbit(changed.c))
        assert {k: int(v) for k, v in rclient.hgetall(f"{{hb:{carried}}}:blobrefs").items()} == (
            _expected_refcounts(rclient, store, carried)
        )


def test_activities_and_reduced_costs_that_the_model_gives_back_are_not_stored(store, rclient):
    """A x and c - A^T y, when the solve reported exactly those numbers (the builtin engine does),
    are recomputed when read, bit for bit; numbers that differ in any bit (another solver's duals)
    are stored as they are."""
    lp = _wide_lp(300, 1500)
    x = np.linspace(0.0, 3.0, lp.n)
    y = np.linspace(-1.0, 1.0, lp.m)
    exact = Solution(x, lp.A @ x, y, lp.c - lp.A.T @ y)
    other = Solution(x, np.nextafter(lp.A @ x, np.inf), y, np.nextafter(lp.c - lp.A.T @ y, np.inf))
    for sol, stored in ((exact, False), (other, True)):
        mid = new_model_id()
        rec = record(lp)
        rec.solution = sol
        store.create(mid, "acme", rec)
        fields = rclient.hgetall(f"{{hb:{mid}}}:v:1")
        assert (b"ref.sol.row_activity" in fields) is stored and (b"ref.sol.reduced_cost" in fields) is stored
        back = store.load(mid, 1).solution
        for name in ("x", "row_activity", "shadow_price", "reduced_cost"):
            assert getattr(back, name).tobytes() == getattr(sol, name).tobytes(), name


def test_the_result_is_stored_compressed_and_read_back_whole(store, rclient):
    lp = from_document(DOC)
    mid = new_model_id()
    rec = record(lp)
    rec.result["pivot_log"] = [{"iteration": k, "leaving": f"row {k}", "step": k / 7} for k in range(500)]
    store.create(mid, "acme", rec)
    raw = rclient.hget(f"{{hb:{mid}}}:v:1", "result.z")
    assert raw is not None and len(raw) < len(orjson.dumps(rec.result)) / 3
    assert store.load(mid, 1).result == rec.result


def test_a_version_pruned_while_it_is_read_reads_as_gone(store, rclient):
    """Reading a version is two commands (its hash, then its pieces); a commit that prunes it in
    between must make the read answer "not kept", not fail on the missing pieces."""
    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    real_mget = store.r.mget

    def mget_after_prune(keys):
        for n in range(1, 5):  # keep_versions=3: version 1 goes, with the pieces only it used
            changed = lp.copy()
            changed.c = lp.c + n
            store.commit(mid, n, record(changed))
        return real_mget(keys)

    store.r.mget = mget_after_prune
    try:
        assert store.load(mid, 1) is None
    finally:
        store.r.mget = real_mget


def test_a_commit_whose_script_fails_in_its_transaction_leaves_no_staging_hash_or_stray_pieces(store, rclient):
    """The commit's transaction SETs the new pieces and the staging hash before its script runs; when
    the script fails (here: a version it prunes is not a hash), those writes must not stay behind,
    since nothing counts them and deleting the model would not find them."""
    import redis

    lp = from_document(DOC)
    mid = new_model_id()
    store.create(mid, "acme", record(lp))
    for n in (2, 3):
        store.commit(mid, n - 1, record(lp, note=f"v{n}"))
    rclient.delete(f"{{hb:{mid}}}:v:1")  # the version the next commit prunes (keep_versions=3)
    rclient.set(f"{{hb:{mid}}}:v:1", b"not a hash")
    before = snapshot(rclient)
    changed = lp.copy()
    changed.c = lp.c + 7.0  # pieces the store lacks, so the transaction SETs them
    with pytest.raises(redis.ResponseError):
        store.commit(mid, 3, record(changed))
    assert snapshot(rclient) == before


def test_a_model_created_again_under_its_id_does_not_take_a_change_made_on_the_old_one(store, rclient):
    """The commit checks the model's creation time as well as its version: a change computed on a
    model that was deleted and created again (same id, same version number) meanwhile is refused."""
    lp = from_document(DOC)
    mid = new_model_id()
    old_head = store.create(mid, "acme", record(lp))
    assert store.delete(mid)
    time.sleep(0.01)  # another creation time
    store.create(mid, "acme", record(lp, note="second life"))
    before = snapshot(rclient)
    with pytest.raises(VersionConflict):
        store.commit(mid, 1, record(lp, note="made on the first"), created_at=old_head.created_at)
    assert snapshot(rclient) == before
    head = store.commit(mid, 1, record(lp), created_at=store.head(mid).created_at)
    assert head.version == 2
