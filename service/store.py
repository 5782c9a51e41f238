"""Redis storage: the only module that knows key names and encodings.

Key layout (``<id>`` is a model id; the braces are Redis Cluster hash tags,
so every key of one model lives in one slot and a transaction over them is
legal on a cluster):

    {hb:<id>}:head        hash: tenant, version, first_version, created_at, updated_at, name, cold_engine
    {hb:<id>}:v:<n>       hash: version n: refs to its pieces, basis, result JSON (zlib), summary JSON
    {hb:<id>}:blob:<d>    one piece of an array (content-addressed), counted in {hb:<id>}:blobrefs
    {hb:<id>}:stage:<r>   a version's fields while its commit runs (renamed to v:<n> or deleted)
    {hb:<id>}:ops         hash: operation id (idempotency key digest or job id) -> version it produced
    {hb:<id>}:opt         sorted set: operation id by time, to expire entries of :ops
    {hbt:<tenant>}:models sorted set: the tenant's model ids by creation time (listing)
    {hbi:<tenant>:<digest>}:rec / :body   idempotency record and stored response body
    {hbr:<tenant>}:bucket hash: the tenant's request token bucket (tokens, time in ms)

Encodings: numpy arrays as raw little-endian buffers (explicit dtypes), the
basis as ``Basis.to_bytes``, names as UTF-8 joined by newlines (names are
printable, so they hold no newline), small records as JSON. Never pickle.

Writes are compare-and-set on the model's version: a new version is one
MULTI/EXEC ending in COMMIT_LUA, which checks the version the caller worked
from (creating and deleting a model use WATCH on the head). A lost race raises
VersionConflict and the caller re-applies its change on the new version.

Redis Cluster: every transaction (and every script) touches the keys of one
hash tag only, so one slot: a model's keys, one idempotency record, one
tenant's rate bucket. The tenant listing is written by its own single-key
command after the model's transaction. ``connect`` picks the client by URL.
"""

from __future__ import annotations

import base64
import hashlib
import secrets
import time
import zlib
from dataclasses import dataclass, field
from typing import Any
from urllib.parse import unquote, urlsplit

import numpy as np
import orjson
import redis
from redis.backoff import ExponentialBackoff
from redis.cluster import ClusterNode, RedisCluster
from redis.retry import Retry
from redis.sentinel import Sentinel

from service.lp.basis import Basis
from service.lp.model import LinearProgram, rows_appended

KEEP_VERSIONS = 20
OP_TTL = 24 * 3600  # seconds an operation id (idempotency key, job id) is remembered per model
IDEMPOTENCY_TTL = 24 * 3600
PENDING_TTL = 120  # seconds a request may hold an idempotency key before another may take over

F8 = np.dtype("<f8")
I4 = np.dtype("<i4")
I8 = np.dtype("<i8")


class StoreError(Exception):
    """Base of storage outcomes the API turns into HTTP answers."""


class ModelNotFound(StoreError):
    pass


class ModelExists(StoreError):
    pass


class VersionConflict(StoreError):
    """The model moved on since the caller read it."""

    def __init__(self, current: int | None) -> None:
        super().__init__(f"model is at version {current}")
        self.current = current


class AlreadyApplied(StoreError):
    """The operation id was already committed; ``version`` is what it produced."""

    def __init__(self, version: int) -> None:
        super().__init__(f"operation already applied as version {version}")
        self.version = version


@dataclass
class Solution:
    """Arrays of a solve in model order (any of them None when the solve has none)."""

    x: np.ndarray | None
    row_activity: np.ndarray | None
    shadow_price: np.ndarray | None
    reduced_cost: np.ndarray | None


@dataclass
class VersionRecord:
    """Everything stored for one version of a model."""

    version: int
    lp: LinearProgram
    basis: Basis | None
    solution: Solution
    result: dict[str, Any]  # JSON: status, objective, solve, pivot_log, changes
    summary: dict[str, Any]  # JSON: one line of the version listing
    created_at: float = field(default_factory=time.time)
    moved_cols: np.ndarray | None = None  # variables whose value moved against the previous version
    moved_rows: np.ndarray | None = None  # constraints whose activity or shadow price moved
    # not stored: the digests of this version's pieces by field, known once it was written or read;
    # the next commit sends only the pieces this version does not already hold
    digests: dict[str, list[str]] | None = field(default=None, repr=False, compare=False)


@dataclass
class Head:
    model_id: str
    tenant: str
    version: int
    first_version: int
    created_at: float
    updated_at: float
    name: str
    cold_engine: str = ""  # engine of this model's cold solves; "" = the service's default

    @property
    def etag(self) -> str:
        return f'"v{self.version}"'


# ------------------------------------------------------------------------------ encodings


def _buf(a: np.ndarray, dtype: np.dtype) -> bytes:
    return np.ascontiguousarray(a, dtype=dtype).tobytes()


def _arr(b: bytes, dtype: np.dtype) -> np.ndarray:
    return np.frombuffer(b, dtype=dtype).astype(dtype.newbyteorder("="), copy=True)


def _names(b: bytes, count: int) -> list[str]:
    if count == 0:
        return []
    out = b.decode("utf-8").split("\n")
    if len(out) != count:
        raise ValueError(f"stored name list holds {len(out)} names, expected {count}")
    return out


# Large arrays are stored in pieces of a fixed number of rows or columns, each a
# content-addressed blob (see split_blobs): a change rewrites only the pieces it
# touches. An appended constraint changes the last row piece of the matrix, of
# the row bounds and of the row names; the cost, bound and name pieces of the
# columns stay shared with the version before, and so do the pieces of the plan
# that did not move.
ROW_PIECE = 256  # rows per piece (matrix rows, row bounds and names, activities, shadow prices)
COL_PIECE = 1024  # columns per piece (costs, column bounds and names, values, reduced costs)

Fields = dict[str, "bytes | list[bytes]"]  # a list value is stored piecewise


# A piece is its bytes, or (carried over from the previous version) the hex digest of a blob that
# version already stores with exactly these bytes: see split_blobs.
Piece = "bytes | str"


def _carried(old_digests: list[str] | None, old_count: int) -> list[str] | None:
    """The previous version's digests for a field, when they are its pieces one for one (a version
    of the whole-array layout had one blob per field, which is one piece only for small fields)."""
    return old_digests if old_digests is not None and len(old_digests) == old_count else None


def _pieces(
    a: np.ndarray,
    dtype: np.dtype,
    size: int,
    old: np.ndarray | None = None,
    old_digests: list[str] | None = None,
) -> list[Piece]:
    buf = np.ascontiguousarray(a, dtype=dtype)
    prev = known = None
    if old is not None:
        prev = np.ascontiguousarray(old, dtype=dtype)
        known = _carried(old_digests, -(-prev.size // size))
        if known is not None and prev.size == buf.size and buf.tobytes() == prev.tobytes():
            return list(known)  # the whole array is unchanged (the common case for costs and bounds)
    out: list[Piece] = [buf[i : i + size].tobytes() for i in range(0, buf.size, size)]
    if known is not None:
        for k in range(min(len(out), len(known))):
            if out[k] == prev[k * size : (k + 1) * size].tobytes():  # bytewise: -0.0 is not 0.0
                out[k] = known[k]
    return out


def _name_pieces(
    names: list[str], size: int, old: list[str] | None = None, old_digests: list[str] | None = None
) -> list[Piece]:
    known = _carried(old_digests, -(-len(old) // size)) if old is not None else None
    if known is not None and (names is old or names == old):
        return list(known)
    out: list[Piece] = []
    for k, i in enumerate(range(0, len(names), size)):
        part = names[i : i + size]
        if known is not None and k < len(known) and part == old[i : i + size]:
            out.append(known[k])
        else:
            out.append("\n".join(part).encode("utf-8"))
    return out


def _whole(value: "bytes | list[bytes]") -> bytes:
    return b"".join(value) if isinstance(value, list) else value


def _row_pieces(A, old=None, old_digests: list[str] | None = None) -> list[Piece]:
    """The matrix by rows, ROW_PIECE rows a piece: [rows, nnz] (int32), the
    piece's own row pointers (int32), column indices (int32), values (float64).

    When ``A`` is ``old`` (the previous version's matrix, whose pieces have
    ``old_digests``) with rows appended, the pieces of old full row blocks are
    carried over and only the rows from the first incomplete block on are encoded.
    """
    import scipy.sparse as sp

    m = A.shape[0]
    first = 0
    known = _carried(old_digests, -(-old.shape[0] // ROW_PIECE)) if old is not None else None
    if known is not None and rows_appended(A, old, bitwise=True):
        first = old.shape[0] // ROW_PIECE  # the old full blocks
    r_start = first * ROW_PIECE
    if r_start:
        C = A.tocsc()
        tail = C.indices >= r_start  # the tail rows' entries, column by column
        cols = np.repeat(np.arange(A.shape[1]), np.diff(C.indptr))[tail]
        rows = C.indices[tail] - r_start
        order = np.lexsort((cols, rows))  # by row, then column: CSR order, sorted within rows
        ptr = np.concatenate([[0], np.cumsum(np.bincount(rows, minlength=m - r_start))])
        R = sp.csr_matrix((C.data[tail][order], cols[order], ptr), shape=(m - r_start, A.shape[1]))
    else:
        R = A.tocsr()
    R.sort_indices()  # one byte form for one matrix, so equal pieces share a blob
    out: list[Piece] = list(known[:first]) if first else []
    for r0 in range(0, R.shape[0], ROW_PIECE):
        r1 = min(R.shape[0], r0 + ROW_PIECE)
        p0, p1 = int(R.indptr[r0]), int(R.indptr[r1])
        out.append(
            np.array([r1 - r0, p1 - p0], dtype=I4).tobytes()
            + _buf(R.indptr[r0 : r1 + 1] - p0, I4)
            + _buf(R.indices[p0:p1], I4)
            + _buf(R.data[p0:p1], F8)
        )
    return out


def _matrix_from_rows(pieces: list[bytes], m: int, n: int):
    import scipy.sparse as sp

    ptrs, idx, vals = [np.zeros(1, dtype=np.int64)], [], []
    offset = 0
    for b in pieces:
        rows, nnz = (int(v) for v in np.frombuffer(b[:8], dtype=I4))
        at = 8
        ptr = np.frombuffer(b[at : at + 4 * (rows + 1)], dtype=I4).astype(np.int64)
        at += 4 * (rows + 1)
        idx.append(np.frombuffer(b[at : at + 4 * nnz], dtype=I4))
        at += 4 * nnz
        vals.append(np.frombuffer(b[at : at + 8 * nnz], dtype=F8))
        ptrs.append(ptr[1:] + offset)
        offset += nnz
    indptr = np.concatenate(ptrs)
    if indptr.size != m + 1:
        raise ValueError(f"stored matrix holds {indptr.size - 1} rows, expected {m}")
    indices = np.concatenate(idx).astype(np.int32) if idx else np.zeros(0, dtype=np.int32)
    data = np.concatenate(vals).astype(np.float64) if vals else np.zeros(0)
    R = sp.csr_matrix((data, indices, indptr), shape=(m, n))
    return R.tocsc()


def encode_lp(lp: LinearProgram, prior: "VersionRecord | None" = None) -> Fields:
    """The model's fields; with ``prior`` (the previous version, its ``digests`` known), the
    pieces equal to the previous version's are given as their digests instead of their bytes."""
    if prior is None or prior.digests is None:
        return _encode_lp(lp, None, {})
    return _encode_lp(lp, prior.lp, prior.digests)


def _encode_lp(lp: LinearProgram, old: LinearProgram | None, dig: dict[str, list[str]]) -> Fields:
    meta = {
        "m": lp.m,
        "n": lp.n,
        "nnz": int(lp.A.nnz),
        "sense": lp.sense,
        "offset": lp.offset,
        "name": lp.name,
    }

    def was(name: str):
        return getattr(old, name) if old is not None else None

    out: Fields = {"lp.meta": orjson.dumps(meta), "lp.rows": _row_pieces(lp.A, was("A"), dig.get("lp.rows"))}
    for name, size in (("c", COL_PIECE), ("col_lower", COL_PIECE), ("col_upper", COL_PIECE),
                       ("row_lower", ROW_PIECE), ("row_upper", ROW_PIECE)):  # fmt: skip
        out["lp." + name] = _pieces(getattr(lp, name), F8, size, was(name), dig.get("lp." + name))
    out["lp.col_names"] = _name_pieces(lp.col_names, COL_PIECE, was("col_names"), dig.get("lp.col_names"))
    out["lp.row_names"] = _name_pieces(lp.row_names, ROW_PIECE, was("row_names"), dig.get("lp.row_names"))
    return out


def _names_of(value: "bytes | list[bytes]", count: int) -> list[str]:
    if isinstance(value, list):
        value = b"\n".join(value)
    return _names(value, count)


def decode_lp(f: dict) -> LinearProgram:
    import scipy.sparse as sp

    meta = orjson.loads(f[b"lp.meta"])
    m, n = meta["m"], meta["n"]
    if b"lp.rows" in f:
        A = _matrix_from_rows(f[b"lp.rows"], m, n)
    else:  # column-wise layout of stores written before the matrix was kept in row pieces
        A = sp.csc_matrix(
            (
                _arr(_whole(f[b"lp.data"]), F8),
                _arr(_whole(f[b"lp.indices"]), I4),
                _arr(_whole(f[b"lp.indptr"]), I8),
            ),
            shape=(m, n),
        )
    return LinearProgram(
        A=A,
        c=_arr(_whole(f[b"lp.c"]), F8),
        col_lower=_arr(_whole(f[b"lp.col_lower"]), F8),
        col_upper=_arr(_whole(f[b"lp.col_upper"]), F8),
        row_lower=_arr(_whole(f[b"lp.row_lower"]), F8),
        row_upper=_arr(_whole(f[b"lp.row_upper"]), F8),
        sense=meta["sense"],
        offset=meta["offset"],
        col_names=_names_of(f[b"lp.col_names"], n),
        row_names=_names_of(f[b"lp.row_names"], m),
        name=meta["name"],
    )


_SOLUTION_FIELDS = ("x", "row_activity", "shadow_price", "reduced_cost")
_SOLUTION_PIECE = {
    "x": COL_PIECE,
    "reduced_cost": COL_PIECE,
    "row_activity": ROW_PIECE,
    "shadow_price": ROW_PIECE,
}


def encode_record(rec: VersionRecord, prior: VersionRecord | None = None) -> Fields:
    """The version's fields (pieces equal to ``prior``'s as digests, see encode_lp)."""
    out = encode_lp(rec.lp, prior)
    if rec.basis is not None:
        out["basis"] = rec.basis.to_bytes()
    carry = prior is not None and prior.digests is not None
    derived = _derived_arrays(rec.lp, rec.solution)
    if derived:
        out["sol.derived"] = ",".join(derived).encode()
    for name in _SOLUTION_FIELDS:
        value = getattr(rec.solution, name)
        if value is not None and name not in derived:
            old = getattr(prior.solution, name) if carry else None
            old_digests = prior.digests.get(f"sol.{name}") if carry else None
            out[f"sol.{name}"] = _pieces(value, F8, _SOLUTION_PIECE[name], old, old_digests)
    if rec.moved_cols is not None:
        out["moved.cols"] = _buf(rec.moved_cols, I4)
    if rec.moved_rows is not None:
        out["moved.rows"] = _buf(rec.moved_rows, I4)
    out["result.z"] = zlib.compress(orjson.dumps(rec.result), 1)  # JSON with long names: ~5x smaller
    out["summary"] = orjson.dumps(rec.summary)
    out["created_at"] = repr(rec.created_at).encode()
    out["version"] = str(rec.version).encode()
    return out


def _same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.shape == b.shape and np.array_equal(
        np.ascontiguousarray(a, F8).view(I8), np.ascontiguousarray(b, F8).view(I8)
    )


def _derived_arrays(lp: LinearProgram, sol: Solution) -> list[str]:
    """The solution arrays that are, bit for bit, what the model gives back from the others: row
    activities A x and reduced costs c - A^T y (the builtin engine reports exactly these). They are
    not stored; decode_record recomputes them with the same operations on the same (canonical,
    sorted) matrix, hence the same numbers. Anything else (HiGHS's own duals) is stored as is."""
    out: list[str] = []
    if not lp.A.has_sorted_indices:
        return out
    if sol.x is not None and sol.row_activity is not None and _same_bits(sol.row_activity, lp.A @ sol.x):
        out.append("row_activity")
    if (
        sol.shadow_price is not None
        and sol.reduced_cost is not None
        and _same_bits(sol.reduced_cost, lp.c - lp.A.T @ sol.shadow_price)
    ):
        out.append("reduced_cost")
    return out


def decode_record(f: dict) -> VersionRecord:
    arrays = {name: f.get(f"sol.{name}".encode()) for name in _SOLUTION_FIELDS}
    values = {name: None if b is None else _arr(_whole(b), F8) for name, b in arrays.items()}
    lp = decode_lp(f)
    derived = f.get(b"sol.derived", b"").decode().split(",")
    if "row_activity" in derived:
        values["row_activity"] = lp.A @ values["x"]
    if "reduced_cost" in derived:
        values["reduced_cost"] = lp.c - lp.A.T @ values["shadow_price"]
    result = zlib.decompress(f[b"result.z"]) if b"result.z" in f else f[b"result"]
    return VersionRecord(
        version=int(f[b"version"]),
        lp=lp,
        basis=Basis.from_bytes(f[b"basis"]) if b"basis" in f else None,
        solution=Solution(**values),
        result=orjson.loads(result),
        summary=orjson.loads(f[b"summary"]),
        created_at=float(f[b"created_at"]),
        moved_cols=_arr(f[b"moved.cols"], I4) if b"moved.cols" in f else None,
        moved_rows=_arr(f[b"moved.rows"], I4) if b"moved.rows" in f else None,
    )


# A version keeps, for each piecewise field, the digests of its pieces under
# "ref.<field>" (comma-separated, in order); the pieces themselves are blobs
# counted by the versions that use them (released on prune and delete). Stores
# written before pieces existed kept one blob per field under the same names.
PIECE_FIELDS = (
    "lp.rows", "lp.c", "lp.col_lower", "lp.col_upper", "lp.row_lower", "lp.row_upper",
    "lp.col_names", "lp.row_names", "sol.x", "sol.row_activity", "sol.shadow_price", "sol.reduced_cost",
)  # fmt: skip
_LEGACY_BLOB_FIELDS = ("lp.indptr", "lp.indices", "lp.data")
REF = "ref."
REF_FIELDS = tuple(REF + name for name in PIECE_FIELDS + _LEGACY_BLOB_FIELDS)


def split_blobs(fields: Fields) -> tuple[dict[str, bytes], dict[str, bytes]]:
    """A version's fields with each piecewise value replaced by its pieces'
    digests, and the pieces given as bytes by digest (carried pieces are digests already)."""
    inline: dict[str, bytes] = {}
    blobs: dict[str, bytes] = {}
    for name, value in fields.items():
        if not isinstance(value, list):
            inline[name] = value
            continue
        digests = []
        for piece in value:
            if isinstance(piece, str):  # carried over: a blob the previous version stores
                digests.append(piece)
                continue
            digest = hashlib.blake2b(piece, digest_size=16).hexdigest()
            blobs[digest] = piece
            digests.append(digest)
        inline[REF + name] = ",".join(digests).encode()
    return inline, blobs


def ref_digests(value: bytes | None) -> list[str]:
    return [d for d in value.decode().split(",") if d] if value else []


def _field_digests(fields: dict[str, bytes]) -> dict[str, list[str]]:
    """The pieces' digests by field of a version as split_blobs wrote it (``VersionRecord.digests``)."""
    return {k[len(REF) :]: ref_digests(v) for k, v in fields.items() if k.startswith(REF)}


# ------------------------------------------------------------------------------ ids


_ID_ALPHABET = "abcdefghijklmnopqrstuvwxyz234567"


def new_model_id() -> str:
    """16 characters of lowercase base32 (80 random bits)."""
    return base64.b32encode(secrets.token_bytes(10)).decode().lower()


def model_id_for(tenant: str, idempotency_key: str) -> str:
    """The model id a create with an Idempotency-Key gets: a retry, even after a crash, finds it."""
    digest = hashlib.sha256(b"model\0" + tenant.encode() + b"\0" + idempotency_key.encode()).digest()
    return base64.b32encode(digest[:10]).decode().lower()


def valid_model_id(text: str) -> bool:
    return len(text) == 16 and all(ch in _ID_ALPHABET for ch in text)


def op_digest(tenant: str, key: str) -> str:
    return hashlib.sha256(tenant.encode() + b"\0" + key.encode()).hexdigest()[:32]


# A token bucket per tenant, refilled at ``rate`` tokens per second up to ``burst``; one request takes
# one token. One key, one script: atomic across gunicorn workers and hosts, legal on a cluster. The
# clock is Redis's own (TIME), so workers with drifting clocks share one notion of "now".
TOKEN_BUCKET_LUA = """
local rate = tonumber(ARGV[1])
local burst = tonumber(ARGV[2])
local t = redis.call('TIME')
local now = tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
local state = redis.call('HMGET', KEYS[1], 'tokens', 'ms')
local tokens = tonumber(state[1])
local last = tonumber(state[2])
if tokens == nil or last == nil then
  tokens = burst
  last = now
end
if now > last then
  tokens = math.min(burst, tokens + (now - last) * rate / 1000)
  last = now
end
local wait = 0
local allowed = 0
if tokens >= 1 then
  tokens = tokens - 1
  allowed = 1
else
  wait = math.ceil((1 - tokens) * 1000 / rate)
end
redis.call('HSET', KEYS[1], 'tokens', tostring(tokens), 'ms', tostring(last))
redis.call('PEXPIRE', KEYS[1], math.ceil(burst * 1000 / rate) + 1000)
return {allowed, wait}
"""


# The version commit, one round trip: a MULTI/EXEC that first writes the pieces the store may lack
# (SET of content-addressed blobs) and the new version's fields into a staging hash, then runs this
# script, which does the compare-and-set on the head's version, the operation id's exactly-once
# check, the pruning beyond the kept versions and the blobs' reference counts, and moves the staging
# hash into place. The bulky bytes stay out of the script (Redis copies a script's arguments into
# Lua at about a microsecond per kilobyte). The script checks everything before its first write; a
# refusal deletes the staging hash and the sent blobs that nothing counts, so a refused commit leaves
# the store as it was. Blobs neither sent nor held make it answer "need": the caller sends them.
#
# KEYS: head, blob counts, ops, ops by time, staging hash.
# ARGV: expected version, versions kept, now, operation id or "", stale-ops cutoff, key prefix of
#       the model ("{hb:<id>}:"), model name, the digests sent (comma-separated), the model's
#       expected creation time as stored (or "": any), so a model deleted and created again under
#       the same id at the same version number is not taken for the one the change was made on.
COMMIT_LUA = """
local head, counts_key, ops_key, opt_key, stage = KEYS[1], KEYS[2], KEYS[3], KEYS[4], KEYS[5]
local expected, keep = tonumber(ARGV[1]), tonumber(ARGV[2])
local now, op_id, cutoff, prefix, name = ARGV[3], ARGV[4], ARGV[5], ARGV[6], ARGV[7]
local CHUNK = 500
local ref_fields = {REF_FIELD_LIST}
local sent, sent_list = {}, {}
for d in string.gmatch(ARGV[8], '[^,]+') do
  if not sent[d] then sent[d] = true; sent_list[#sent_list + 1] = d end
end

local function counts_of(list)
  local out = {}
  for s = 1, #list, CHUNK do
    local part = {}
    for k = s, math.min(#list, s + CHUNK - 1) do part[#part + 1] = list[k] end
    local got = redis.call('HMGET', counts_key, unpack(part))
    for k = 1, #part do out[part[k]] = tonumber(got[k]) or 0 end
  end
  return out
end

local function refuse(...)
  redis.call('DEL', stage)
  local held = counts_of(sent_list)
  for _, d in ipairs(sent_list) do
    if held[d] == 0 then redis.call('DEL', prefix .. 'blob:' .. d) end
  end
  return {...}
end

local st = redis.call('HMGET', head, 'version', 'first_version', 'tenant', 'created_at', 'cold_engine')
if not st[1] then return refuse('missing') end
if op_id ~= '' then
  local done = redis.call('HGET', ops_key, op_id)
  if done then return refuse('applied', done) end
end
local version = tonumber(st[1])
if version ~= expected or (ARGV[9] ~= '' and st[4] ~= ARGV[9]) then return refuse('conflict', st[1]) end
local old_first = tonumber(st[2])
local new = version + 1
local first = math.max(old_first, new - keep + 1)

-- a version counts once for each distinct blob it uses, however many of its pieces share it
local delta, order = {}, {}
local function count(vals, by)
  local seen = {}
  for k = 1, #ref_fields do
    if vals[k] then
      for d in string.gmatch(vals[k], '[^,]+') do
        if not seen[d] then
          seen[d] = true
          local c = delta[d]
          if c == nil then order[#order + 1] = d; c = 0 end
          delta[d] = c + by
        end
      end
    end
  end
end
count(redis.call('HMGET', stage, unpack(ref_fields)), 1)
for old = old_first, first - 1 do
  count(redis.call('HMGET', prefix .. 'v:' .. old, unpack(ref_fields)), -1)
end

-- every check before the first write
local moved = {}
for _, d in ipairs(order) do
  if delta[d] ~= 0 then moved[#moved + 1] = d end
end
local before = counts_of(moved)
local need = {}
for _, d in ipairs(moved) do
  if before[d] == 0 and delta[d] > 0 and not sent[d] then need[#need + 1] = d end
end
if #need > 0 then return refuse('need', table.concat(need, ',')) end

-- the writes
local set_counts, gone = {}, {}
for _, d in ipairs(moved) do
  local after = before[d] + delta[d]
  if after > 0 then
    set_counts[#set_counts + 1] = d
    set_counts[#set_counts + 1] = after
  else
    gone[#gone + 1] = d
  end
end
for s = 1, #set_counts, 2 * CHUNK do
  redis.call('HSET', counts_key, unpack(set_counts, s, math.min(#set_counts, s + 2 * CHUNK - 1)))
end
for s = 1, #gone, CHUNK do
  local last = math.min(#gone, s + CHUNK - 1)
  redis.call('HDEL', counts_key, unpack(gone, s, last))
  local keys = {}
  for k = s, last do keys[#keys + 1] = prefix .. 'blob:' .. gone[k] end
  redis.call('DEL', unpack(keys))
end
-- a sent blob that ends up uncounted (its count was already there and nothing new uses it) goes
local unused = {}
for _, d in ipairs(sent_list) do
  if delta[d] == nil or delta[d] == 0 then unused[#unused + 1] = d end
end
local held = counts_of(unused)
for _, d in ipairs(unused) do
  if held[d] == 0 then redis.call('DEL', prefix .. 'blob:' .. d) end
end
for old = old_first, first - 1 do redis.call('DEL', prefix .. 'v:' .. old) end
redis.call('RENAME', stage, prefix .. 'v:' .. new)
redis.call('HSET', head, 'version', new, 'first_version', first, 'updated_at', now, 'name', name)
if op_id ~= '' then
  redis.call('HSET', ops_key, op_id, new)
  redis.call('ZADD', opt_key, now, op_id)
end
local stale = redis.call('ZRANGEBYSCORE', opt_key, '-inf', cutoff)
for s = 1, #stale, CHUNK do
  local last = math.min(#stale, s + CHUNK - 1)
  redis.call('HDEL', ops_key, unpack(stale, s, last))
  redis.call('ZREM', opt_key, unpack(stale, s, last))
end
return {'ok', tostring(new), tostring(first), st[3], st[4], st[5] or ''}
""".replace("REF_FIELD_LIST", ", ".join(f"'{name}'" for name in REF_FIELDS))


# After a commit script that failed inside its transaction: the staging hash and the sent pieces that
# nothing counts go (what COMMIT_LUA's refusal does). KEYS: blob counts, staging hash. ARGV: the key
# prefix of the model, the digests sent (comma-separated).
RELEASE_LUA = """
redis.call('DEL', KEYS[2])
for d in string.gmatch(ARGV[2], '[^,]+') do
  if redis.call('HEXISTS', KEYS[1], d) == 0 then redis.call('DEL', ARGV[1] .. 'blob:' .. d) end
end
return 0
"""


# ------------------------------------------------------------------------------ connecting

SOCKET_TIMEOUT = 3.0  # seconds a command may wait for Redis before the request answers 503
CONNECT_TIMEOUT = 2.0
CLUSTER_SCHEMES = ("redis+cluster", "rediss+cluster")


def _retry() -> Retry:
    # One quick retry on a dropped connection (a pooled socket that died with a restarted Redis);
    # a timeout is not retried, so no command waits longer than its timeout.
    return Retry(ExponentialBackoff(cap=0.05, base=0.01), 1, supported_errors=(redis.ConnectionError,))


def _hosts(netloc: str, default_port: int) -> list[tuple[str, int]]:
    out = []
    for part in netloc.split(","):
        host, _, port = part.strip().rpartition(":")
        if not host:
            host, port = port, ""
        out.append((host.strip("[]"), int(port or default_port)))
    return out


def connect(url: str, timeout: float = SOCKET_TIMEOUT, connect_timeout: float = CONNECT_TIMEOUT) -> Any:
    """A Redis client for ``url``, with bounded timeouts.

    - ``redis://``, ``rediss://`` (TLS), ``unix://``: one server (a managed Redis, a proxy);
    - ``redis+cluster://[user:password@]host:port[,host:port...]`` (or ``rediss+cluster``): a Redis
      Cluster through redis-py's cluster client; the listed nodes are only where discovery starts;
    - ``redis+sentinel://[user:password@]host:port[,host:port...]/<master name>[/<db>]``: the current
      primary of a Sentinel-monitored group, found through the listed sentinels on every reconnect
      (the password is the data server's; the sentinels are asked without one).
    """
    parsed = urlsplit(url)
    common: dict[str, Any] = {
        "socket_timeout": timeout,
        "socket_connect_timeout": connect_timeout,
        "retry": _retry(),
    }
    if parsed.username:
        common["username"] = unquote(parsed.username)
    if parsed.password:
        common["password"] = unquote(parsed.password)
    netloc = parsed.netloc.rpartition("@")[2]
    if parsed.scheme in CLUSTER_SCHEMES:
        nodes = [ClusterNode(h, p) for h, p in _hosts(netloc, 6379)]
        return RedisCluster(
            startup_nodes=nodes,
            ssl=parsed.scheme.startswith("rediss"),
            **common,
        )
    if parsed.scheme == "redis+sentinel":
        parts = [p for p in parsed.path.split("/") if p]
        if not parts:
            raise ValueError("a sentinel URL names the monitored master: redis+sentinel://host:port/<name>")
        db = int(parts[1]) if len(parts) > 1 else 0
        sentinel = Sentinel(
            _hosts(netloc, 26379),
            sentinel_kwargs={"socket_timeout": timeout, "socket_connect_timeout": connect_timeout},
        )
        return sentinel.master_for(parts[0], db=db, **common)
    return redis.Redis.from_url(url, health_check_interval=30, **common)


# ------------------------------------------------------------------------------ the store


class Store:
    """Models, versions and idempotency records in Redis."""

    def __init__(self, client: redis.Redis, keep_versions: int = KEEP_VERSIONS, op_ttl: int = OP_TTL) -> None:
        self.r = client
        self.keep = max(1, int(keep_versions))
        self.op_ttl = op_ttl
        self._token_script: Any = None

    @classmethod
    def from_url(
        cls,
        url: str,
        timeout: float = SOCKET_TIMEOUT,
        connect_timeout: float = CONNECT_TIMEOUT,
        **kwargs: Any,
    ) -> Store:
        return cls(connect(url, timeout, connect_timeout), **kwargs)

    # keys
    @staticmethod
    def _head(mid: str) -> str:
        return f"{{hb:{mid}}}:head"

    @staticmethod
    def _ver(mid: str, n: int) -> str:
        return f"{{hb:{mid}}}:v:{n}"

    @staticmethod
    def _ops(mid: str) -> str:
        return f"{{hb:{mid}}}:ops"

    @staticmethod
    def _opt(mid: str) -> str:
        return f"{{hb:{mid}}}:opt"

    @staticmethod
    def _blob(mid: str, digest: str) -> str:
        return f"{{hb:{mid}}}:blob:{digest}"

    @staticmethod
    def _blobrefs(mid: str) -> str:
        return f"{{hb:{mid}}}:blobrefs"

    @staticmethod
    def _index(tenant: str) -> str:
        return f"{{hbt:{tenant}}}:models"

    @staticmethod
    def _idem(tenant: str, digest: str) -> tuple[str, str]:
        tag = f"{{hbi:{tenant}:{digest}}}"
        return f"{tag}:rec", f"{tag}:body"

    @staticmethod
    def _bucket(tenant: str) -> str:
        return f"{{hbr:{tenant}}}:bucket"

    def ping(self) -> bool:
        return bool(self.r.ping())

    def take_token(self, tenant: str, rate: float, burst: int) -> tuple[bool, float]:
        """Take one request token of ``tenant``: (allowed, seconds until a token is there if not)."""
        if self._token_script is None:
            self._token_script = self.r.register_script(TOKEN_BUCKET_LUA)
        allowed, wait_ms = self._token_script(keys=[self._bucket(tenant)], args=[repr(rate), max(1, burst)])
        return bool(allowed), int(wait_ms) / 1000.0

    # ---- reading
    def head(self, model_id: str) -> Head | None:
        return self._decode_head(model_id, self.r.hgetall(self._head(model_id)))

    @staticmethod
    def _decode_head(model_id: str, raw: dict[bytes, bytes]) -> Head | None:
        if not raw or b"version" not in raw:
            return None
        return Head(
            model_id=model_id,
            tenant=raw[b"tenant"].decode(),
            version=int(raw[b"version"]),
            first_version=int(raw[b"first_version"]),
            created_at=float(raw[b"created_at"]),
            updated_at=float(raw[b"updated_at"]),
            name=raw.get(b"name", b"").decode(),
            cold_engine=raw.get(b"cold_engine", b"").decode(),
        )

    def load(self, model_id: str, version: int) -> VersionRecord | None:
        raw = self.r.hgetall(self._ver(model_id, version))
        if not raw:
            return None
        refs = {k[len(REF) :]: ref_digests(v) for k, v in raw.items() if k.startswith(REF.encode())}
        wanted = sorted({d for digests in refs.values() for d in digests})
        found = dict(zip(wanted, self.r.mget([self._blob(model_id, d) for d in wanted]))) if wanted else {}
        for name, digests in refs.items():
            missing = [d for d in digests if found[d] is None]
            if missing:
                if not self.r.exists(self._ver(model_id, version)):
                    return None  # pruned (or the model deleted) between the two reads
                raise ValueError(f"model {model_id} version {version}: blob {missing[0]} is missing")
            raw[name] = [found[d] for d in digests]  # the pieces in order (one whole blob in old stores)
        record = decode_record(raw)
        record.digests = {name.decode(): digests for name, digests in refs.items()}
        return record

    def summaries(self, head: Head) -> list[dict[str, Any]]:
        """Summary of every kept version, oldest first."""
        numbers = list(range(head.first_version, head.version + 1))
        pipe = self.r.pipeline(transaction=False)
        for n in numbers:
            pipe.hget(self._ver(head.model_id, n), "summary")
        return [orjson.loads(raw) for raw in pipe.execute() if raw]

    def op_version(self, model_id: str, op_id: str) -> int | None:
        raw = self.r.hget(self._ops(model_id), op_id)
        return int(raw) if raw else None

    def list_models(self, tenant: str, offset: int, limit: int) -> tuple[list[Head], int]:
        key = self._index(tenant)
        total = int(self.r.zcard(key))
        ids = [b.decode() for b in self.r.zrange(key, offset, offset + limit - 1)]
        pipe = self.r.pipeline(transaction=False)
        for mid in ids:
            pipe.hgetall(self._head(mid))
        heads = []
        for mid, raw in zip(ids, pipe.execute()):
            h = self._decode_head(mid, raw)
            if h is None:  # a delete that stopped half way; tidy the listing
                self.r.zrem(key, mid)
                continue
            heads.append(h)
        return heads, total

    # ---- writing
    def create(
        self,
        model_id: str,
        tenant: str,
        record: VersionRecord,
        op_id: str | None = None,
        cold_engine: str = "",
    ) -> Head:
        """Store a new model as version 1; raises ModelExists if the id is taken."""
        head_key = self._head(model_id)
        now = record.created_at
        record.version = 1
        record.summary["version"] = 1
        fields, blobs = split_blobs(encode_record(record))
        with self.r.pipeline(transaction=True) as pipe:
            try:
                pipe.watch(head_key)
                if pipe.exists(head_key):
                    raise ModelExists(model_id)
                # counts read under the WATCH: a blob left under this id keeps its bytes and gains a count
                digests = list(blobs)
                counts = (
                    [int(c or 0) for c in pipe.hmget(self._blobrefs(model_id), digests)] if digests else []
                )
                pipe.multi()
                for d, c in zip(digests, counts):
                    if c == 0:
                        pipe.set(self._blob(model_id, d), blobs[d])
                if digests:
                    pipe.hset(self._blobrefs(model_id), mapping={d: c + 1 for d, c in zip(digests, counts)})
                pipe.hset(self._ver(model_id, 1), mapping=fields)
                pipe.hset(
                    head_key,
                    mapping={
                        "tenant": tenant,
                        "version": 1,
                        "first_version": 1,
                        "created_at": repr(now),
                        "updated_at": repr(now),
                        "name": record.lp.name,
                        "cold_engine": cold_engine,
                    },
                )
                if op_id:
                    pipe.hset(self._ops(model_id), op_id, 1)
                    pipe.zadd(self._opt(model_id), {op_id: now})
                pipe.execute()
            except redis.WatchError as exc:
                raise ModelExists(model_id) from exc
        record.digests = _field_digests(fields)
        # the listing lives in the tenant's slot, so it cannot join the transaction above
        self.r.zadd(self._index(tenant), {model_id: now})
        return Head(model_id, tenant, 1, 1, now, now, record.lp.name, cold_engine)

    def commit(
        self,
        model_id: str,
        expected_version: int,
        record: VersionRecord,
        op_id: str | None = None,
        prior: VersionRecord | None = None,
        created_at: float | None = None,
    ) -> Head:
        """Store ``record`` as version expected_version + 1 if the model is still at expected_version.

        One script call (COMMIT_LUA) does the compare-and-set, the pruning and
        the blob counts. ``prior``, the version the caller worked from (with its
        ``digests``), lets the pieces it already stores be named instead of
        encoded, hashed and sent.
        ``created_at``: the model's creation time as read with its head; a model
        deleted and created again under the same id since then is a conflict.
        Raises VersionConflict when another write came first, AlreadyApplied
        when ``op_id`` was committed before, ModelNotFound when the model is gone.
        """
        now = record.created_at
        record.version = expected_version + 1  # what the script checks; a conflict discards the record
        record.summary["version"] = record.version
        if prior is not None and prior.digests is None:
            prior = None
        fields, blobs = split_blobs(encode_record(record, prior))
        held = {d for known in prior.digests.values() for d in known} if prior is not None else set()
        send = [d for d in blobs if d not in held]
        stage = f"{{hb:{model_id}}}:stage:{secrets.token_hex(8)}"
        keys = [
            self._head(model_id),
            self._blobrefs(model_id),
            self._ops(model_id),
            self._opt(model_id),
            stage,
        ]
        for _attempt in range(2):
            args = [expected_version, self.keep, repr(now), op_id or "", repr(now - self.op_ttl),
                    f"{{hb:{model_id}}}:", record.lp.name, ",".join(send),
                    "" if created_at is None else repr(created_at)]  # fmt: skip
            with self.r.pipeline(transaction=True) as pipe:
                if send:  # one MSET (the model's keys share one cluster slot), not a SET per piece;
                    # by execute_command, as cluster pipelines block .mset
                    pipe.execute_command("MSET", *[x for d in send for x in (self._blob(model_id, d), blobs[d])])
                pipe.hset(stage, mapping=fields)
                # EVAL, not EVALSHA: a script missing from Redis's cache (after a restart) would fail
                # inside the transaction after the writes before it; the 5 KB text is cheap to send
                pipe.execute_command(
                    "EVAL", COMMIT_LUA, len(keys), *keys, *args
                )  # (cluster pipelines have no .eval)
                try:
                    reply = pipe.execute()[-1]
                except redis.ResponseError:
                    # the script failed inside the transaction (e.g. a key it reads moved away during a
                    # cluster reshard): the SETs and the staging hash before it stayed; take them back
                    self._release(model_id, stage, send)
                    raise
            outcome = reply[0].decode()
            if outcome != "need":
                break
            # the store lacks blobs the caller took for held (its cached version is not what Redis
            # holds, e.g. a model deleted and created again under the same id): send every piece
            fields, blobs = split_blobs(encode_record(record))
            send = list(blobs)
        if outcome == "missing":
            raise ModelNotFound(model_id)
        if outcome == "applied":
            raise AlreadyApplied(int(reply[1]))
        if outcome == "conflict":
            raise VersionConflict(int(reply[1]))
        if outcome != "ok":
            raise StoreError(f"commit of model {model_id}: {outcome}")
        new, first = int(reply[1]), int(reply[2])
        tenant, created_at, cold_engine = (b.decode() for b in reply[3:6])
        record.digests = _field_digests(fields)
        return Head(model_id, tenant, new, first, float(created_at), now, record.lp.name, cold_engine)

    def _release(self, model_id: str, stage: str, sent: list[str]) -> None:
        """Best effort after a failed commit script: drop the staging hash and the sent pieces that
        no version counts (one script, so a concurrent commit that counts one of them keeps it)."""
        try:
            self.r.execute_command(
                "EVAL", RELEASE_LUA, 2, self._blobrefs(model_id), stage, f"{{hb:{model_id}}}:", ",".join(sent)
            )
        except redis.RedisError:
            pass  # the original error is what the caller hears about

    def delete(self, model_id: str) -> bool:
        head_key = self._head(model_id)
        while True:
            with self.r.pipeline(transaction=True) as pipe:
                try:
                    pipe.watch(head_key)
                    head = self._decode_head(model_id, pipe.hgetall(head_key))
                    if head is None:
                        return False
                    digests = [d.decode() for d in pipe.hkeys(self._blobrefs(model_id))]
                    pipe.multi()
                    keys = [self._ver(model_id, n) for n in range(head.first_version, head.version + 1)]
                    keys += [self._blob(model_id, d) for d in digests] + [self._blobrefs(model_id)]
                    pipe.delete(head_key, self._ops(model_id), self._opt(model_id), *keys)
                    pipe.execute()
                except redis.WatchError:
                    continue
            self.r.zrem(self._index(head.tenant), model_id)
            return True

    # ---- idempotency records
    def idem_begin(self, tenant: str, key: str, fingerprint: str) -> dict[str, Any] | None:
        """Reserve an Idempotency-Key, or return what is already recorded under it.

        Returns None when the caller now holds the key; otherwise a dict with
        "state" ("pending" or "done"), "fingerprint" and, when done, "status",
        "headers" and "body".
        """
        rec_key, body_key = self._idem(tenant, op_digest(tenant, key))
        pending = orjson.dumps({"state": "pending", "fingerprint": fingerprint})
        for _ in range(5):
            if self.r.set(rec_key, pending, nx=True, ex=PENDING_TTL):
                return None
            raw = self.r.get(rec_key)
            if raw is None:  # expired between the two calls
                continue
            rec = orjson.loads(raw)
            if rec.get("state") == "done":
                body = self.r.get(body_key)
                rec["body"] = zlib.decompress(body) if body else b""
            return rec
        raise StoreError("could not reserve the idempotency key")

    def idem_finish(
        self,
        tenant: str,
        key: str,
        fingerprint: str,
        status: int,
        headers: dict[str, str],
        body: bytes,
        ttl: int = IDEMPOTENCY_TTL,
    ) -> None:
        rec_key, body_key = self._idem(tenant, op_digest(tenant, key))
        rec = {"state": "done", "fingerprint": fingerprint, "status": status, "headers": headers}
        pipe = self.r.pipeline(transaction=True)
        pipe.set(body_key, zlib.compress(body, 1), ex=ttl)
        pipe.set(rec_key, orjson.dumps(rec), ex=ttl)
        pipe.execute()

    def idem_abort(self, tenant: str, key: str) -> None:
        rec_key, body_key = self._idem(tenant, op_digest(tenant, key))
        self.r.delete(rec_key, body_key)
