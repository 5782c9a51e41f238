"""Redis storage: the only module that knows key names and encodings.

Key layout (``<id>`` is a model id; the braces are Redis Cluster hash tags,
so every key of one model lives in one slot and a transaction over them is
legal on a cluster):

    {hb:<id>}:head        hash: tenant, version, first_version, created_at, updated_at, name, cold_engine
    {hb:<id>}:v:<n>       hash: version n: model arrays, basis, solution arrays, result JSON, summary JSON
    {hb:<id>}:ops         hash: operation id (idempotency key digest or job id) -> version it produced
    {hb:<id>}:opt         sorted set: operation id by time, to expire entries of :ops
    {hbt:<tenant>}:models sorted set: the tenant's model ids by creation time (listing)
    {hbi:<tenant>:<digest>}:rec / :body   idempotency record and stored response body
    {hbr:<tenant>}:bucket hash: the tenant's request token bucket (tokens, time in ms)

Encodings: numpy arrays as raw little-endian buffers (explicit dtypes), the
basis as ``Basis.to_bytes``, names as UTF-8 joined by newlines (names are
printable, so they hold no newline), small records as JSON. Never pickle.

Writes are compare-and-set on the model's version: WATCH the head, check the
version the caller worked from, then MULTI/EXEC. A lost race raises
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
from service.lp.model import LinearProgram

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


def _pieces(a: np.ndarray, dtype: np.dtype, size: int) -> list[bytes]:
    buf = np.ascontiguousarray(a, dtype=dtype)
    return [buf[i : i + size].tobytes() for i in range(0, buf.size, size)]


def _name_pieces(names: list[str], size: int) -> list[bytes]:
    return ["\n".join(names[i : i + size]).encode("utf-8") for i in range(0, len(names), size)]


def _whole(value: "bytes | list[bytes]") -> bytes:
    return b"".join(value) if isinstance(value, list) else value


def _row_pieces(A) -> list[bytes]:
    """The matrix by rows, ROW_PIECE rows a piece: [rows, nnz] (int32), the
    piece's own row pointers (int32), column indices (int32), values (float64)."""
    R = A.tocsr()
    R.sort_indices()  # one byte form for one matrix, so equal pieces share a blob
    out = []
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


def encode_lp(lp: LinearProgram) -> Fields:
    meta = {
        "m": lp.m,
        "n": lp.n,
        "nnz": int(lp.A.nnz),
        "sense": lp.sense,
        "offset": lp.offset,
        "name": lp.name,
    }
    return {
        "lp.meta": orjson.dumps(meta),
        "lp.rows": _row_pieces(lp.A),
        "lp.c": _pieces(lp.c, F8, COL_PIECE),
        "lp.col_lower": _pieces(lp.col_lower, F8, COL_PIECE),
        "lp.col_upper": _pieces(lp.col_upper, F8, COL_PIECE),
        "lp.row_lower": _pieces(lp.row_lower, F8, ROW_PIECE),
        "lp.row_upper": _pieces(lp.row_upper, F8, ROW_PIECE),
        "lp.col_names": _name_pieces(lp.col_names, COL_PIECE),
        "lp.row_names": _name_pieces(lp.row_names, ROW_PIECE),
    }


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


def encode_record(rec: VersionRecord) -> Fields:
    out = encode_lp(rec.lp)
    if rec.basis is not None:
        out["basis"] = rec.basis.to_bytes()
    for name in _SOLUTION_FIELDS:
        value = getattr(rec.solution, name)
        if value is not None:
            out[f"sol.{name}"] = _pieces(value, F8, _SOLUTION_PIECE[name])
    if rec.moved_cols is not None:
        out["moved.cols"] = _buf(rec.moved_cols, I4)
    if rec.moved_rows is not None:
        out["moved.rows"] = _buf(rec.moved_rows, I4)
    out["result"] = orjson.dumps(rec.result)
    out["summary"] = orjson.dumps(rec.summary)
    out["created_at"] = repr(rec.created_at).encode()
    out["version"] = str(rec.version).encode()
    return out


def decode_record(f: dict) -> VersionRecord:
    arrays = [f.get(f"sol.{name}".encode()) for name in _SOLUTION_FIELDS]
    sol = Solution(*(None if b is None else _arr(_whole(b), F8) for b in arrays))
    return VersionRecord(
        version=int(f[b"version"]),
        lp=decode_lp(f),
        basis=Basis.from_bytes(f[b"basis"]) if b"basis" in f else None,
        solution=sol,
        result=orjson.loads(f[b"result"]),
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
_NAME_FIELDS = (b"lp.col_names", b"lp.row_names")


def split_blobs(fields: Fields) -> tuple[dict[str, bytes], dict[str, bytes]]:
    """A version's fields with each piecewise value replaced by its pieces'
    digests, and the pieces by digest."""
    inline: dict[str, bytes] = {}
    blobs: dict[str, bytes] = {}
    for name, value in fields.items():
        if not isinstance(value, list):
            inline[name] = value
            continue
        digests = []
        for piece in value:
            digest = hashlib.blake2b(piece, digest_size=16).hexdigest()
            blobs[digest] = piece
            digests.append(digest)
        inline[REF + name] = ",".join(digests).encode()
    return inline, blobs


def ref_digests(value: bytes | None) -> list[str]:
    return [d for d in value.decode().split(",") if d] if value else []


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

    def _version_refs(self, pipe: Any, mid: str, version: int) -> set[str]:
        vals = pipe.hmget(self._ver(mid, version), list(REF_FIELDS))
        return {d for v in vals for d in ref_digests(v)}

    def _plan_blobs(
        self, pipe: Any, mid: str, blobs: dict[str, bytes], dropped: list[set[str]]
    ) -> list[tuple[str, Any]]:
        """Blob writes for a version that uses ``blobs`` while versions using ``dropped`` go.

        Read before MULTI (under the head's WATCH, which every writer of this
        model takes, so the counts cannot move underneath); returns the commands
        to queue inside the transaction.
        """
        involved = sorted(set(blobs).union(*dropped)) if (blobs or dropped) else []
        if not involved:
            return []
        counts = {d: int(c or 0) for d, c in zip(involved, pipe.hmget(self._blobrefs(mid), involved))}
        after = dict(counts)
        for d in blobs:
            after[d] += 1
        for refs in dropped:
            for d in refs:
                after[d] -= 1
        ops: list[tuple[str, tuple, dict]] = []
        counted: dict[str, int] = {}
        gone: list[str] = []
        for d in involved:
            if after[d] > 0:
                if counts[d] == 0:
                    ops.append(("set", (self._blob(mid, d), blobs[d]), {}))
                if after[d] != counts[d]:
                    counted[d] = after[d]
            else:
                gone.append(d)
        # one command each for the counts and the releases (a version has hundreds of pieces)
        if counted:
            ops.append(("hset", (self._blobrefs(mid),), {"mapping": counted}))
        if gone:
            ops.append(("hdel", (self._blobrefs(mid), *gone), {}))
            ops.append(("delete", tuple(self._blob(mid, d) for d in gone), {}))
        return ops

    @staticmethod
    def _queue(pipe: Any, ops: list[tuple[str, tuple, dict]]) -> None:
        for name, args, kwargs in ops:
            getattr(pipe, name)(*args, **kwargs)

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
                raise ValueError(f"model {model_id} version {version}: blob {missing[0]} is missing")
            raw[name] = [found[d] for d in digests]  # the pieces in order (one whole blob in old stores)
        return decode_record(raw)

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
                blob_ops = self._plan_blobs(pipe, model_id, blobs, [])
                pipe.multi()
                self._queue(pipe, blob_ops)
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
        # the listing lives in the tenant's slot, so it cannot join the transaction above
        self.r.zadd(self._index(tenant), {model_id: now})
        return Head(model_id, tenant, 1, 1, now, now, record.lp.name, cold_engine)

    def commit(
        self, model_id: str, expected_version: int, record: VersionRecord, op_id: str | None = None
    ) -> Head:
        """Store ``record`` as version expected_version + 1 if the model is still at expected_version.

        Raises VersionConflict when another write came first, AlreadyApplied
        when ``op_id`` was committed before, ModelNotFound when the model is gone.
        """
        head_key = self._head(model_id)
        now = record.created_at
        with self.r.pipeline(transaction=True) as pipe:
            try:
                pipe.watch(head_key)
                raw = pipe.hgetall(head_key)
                head = self._decode_head(model_id, raw)
                if head is None:
                    raise ModelNotFound(model_id)
                if op_id:
                    done = pipe.hget(self._ops(model_id), op_id)
                    if done:
                        raise AlreadyApplied(int(done))
                if head.version != expected_version:
                    raise VersionConflict(head.version)
                new = head.version + 1
                record.version = new
                record.summary["version"] = new  # the store, not the caller, numbers versions
                first = max(head.first_version, new - self.keep + 1)
                stale_ops = pipe.zrangebyscore(self._opt(model_id), "-inf", now - self.op_ttl)
                fields, blobs = split_blobs(encode_record(record))
                dropped = [
                    self._version_refs(pipe, model_id, old) for old in range(head.first_version, first)
                ]
                blob_ops = self._plan_blobs(pipe, model_id, blobs, dropped)
                pipe.multi()
                self._queue(pipe, blob_ops)
                pipe.hset(self._ver(model_id, new), mapping=fields)
                pipe.hset(
                    head_key,
                    mapping={
                        "version": new,
                        "first_version": first,
                        "updated_at": repr(now),
                        "name": record.lp.name,
                    },
                )
                for old in range(head.first_version, first):
                    pipe.delete(self._ver(model_id, old))
                if op_id:
                    pipe.hset(self._ops(model_id), op_id, new)
                    pipe.zadd(self._opt(model_id), {op_id: now})
                if stale_ops:
                    pipe.hdel(self._ops(model_id), *stale_ops)
                    pipe.zrem(self._opt(model_id), *stale_ops)
                pipe.execute()
            except redis.WatchError as exc:
                raise VersionConflict(None) from exc
        return Head(model_id, head.tenant, new, first, head.created_at, now, record.lp.name, head.cold_engine)

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
