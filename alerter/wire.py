"""The wire format of input entries on Redis Streams: pure encoding and decoding.

Every entry is a flat map of fields (what XADD takes). Fields common to all entries:
``v`` (wire version, ``1``; optional when typing by hand) and ``type``.

- ``type=count``: one node-hour: ``node``, ``hour`` (UTC ISO 8601, whole hour), ``count``
  (a number >= 0).
- ``type=batch``: many counts of one ``hour``; ``enc`` says how ``nodes`` and ``counts``
  are packed: ``json`` (two JSON arrays of equal length, ids and numbers or null) or
  ``f64`` (ids joined by ``\\n`` in UTF-8, counts as little-endian float64, NaN missing).
  The producer sends ``f64`` batches: decoding them costs a split and a ``frombuffer``.
- ``type=edge_add`` / ``type=edge_remove``: a directed link ``src -> dst`` appears or
  disappears, optional ``ts``; it takes effect for the counts that follow it in the stream.

Decoding never trusts its input: anything wrong raises BadEntryError with a reason that
names the field and the bad value, and the entry goes to the dead-letter stream.
"""

from __future__ import annotations

import json
import math
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime

import numpy as np

from .constants import WIRE_VERSION, Encoding, EntryType
from .errors import BadEntryError
from .timeaxis import format_hour, parse_hour, parse_instant

__all__ = ["CountBatch", "PackedIds", "EdgeChange", "Decoded", "encode_count", "encode_batch", "encode_edge",
           "decode_entry", "fields_text", "DEFAULT_MAX_BYTES", "partition_of",
           "pack_ids", "unpack_ids", "pack_table", "table_ids", "unpack_table"]

DEFAULT_MAX_BYTES = 16 * 1024 * 1024
_F64 = np.dtype("<f8")


class PackedIds(list[str]):
    r"""The node ids of an ``f64`` batch entry together with the bytes they were unpacked from
    (``packed``), so that a reader who has seen the same bytes before (a producer sends its
    nodes in the same order every hour) reuses its index mapping instead of looking up every
    id again (``buckets.dense_counts``). Pickles as a plain list: checkpoints stay lean.

    >>> import pickle
    >>> ids = PackedIds(["/a", "/b"], b"/a\n/b")
    >>> ids == ["/a", "/b"], ids.packed, type(pickle.loads(pickle.dumps(ids))).__name__
    (True, b'/a\n/b', 'list')
    """

    def __init__(self, ids: Sequence[str], packed: bytes) -> None:
        super().__init__(ids)
        self.packed = packed

    def __reduce__(self) -> tuple[type, tuple[list[str]]]:
        return list, (list(self),)


@dataclass(frozen=True)
class CountBatch:
    """Counts of some nodes for one hour; ``values`` is float64 with NaN for missing."""

    hour: datetime
    nodes: list[str]
    values: np.ndarray


@dataclass(frozen=True)
class EdgeChange:
    """A link appearing (``op="add"``) or disappearing (``op="remove"``)."""

    op: str
    src: str
    dst: str
    ts: datetime | None = None


Decoded = CountBatch | EdgeChange
Fields = Mapping[bytes, bytes] | Mapping[str, str | bytes]


# --- encoding --------------------------------------------------------------------------

def encode_count(node: str, hour: datetime, count: float) -> dict[str, str | bytes]:
    """Fields of a single count entry.

    >>> from alerter.timeaxis import parse_hour
    >>> encode_count("/news", parse_hour("2026-11-02T07:00:00Z"), 880)
    {'v': '1', 'type': 'count', 'node': '/news', 'hour': '2026-11-02T07:00:00Z', 'count': '880'}
    """
    text = repr(float(count)) if not float(count).is_integer() else str(int(count))
    return {"v": WIRE_VERSION, "type": EntryType.COUNT.value, "node": node, "hour": format_hour(hour),
            "count": text}


def encode_batch(hour: datetime, nodes: Sequence[str], values: np.ndarray | Sequence[float | None],
                 enc: Encoding = Encoding.F64) -> dict[str, str | bytes]:
    """Fields of a batch entry; ``f64`` falls back to ``json`` if an id holds a newline."""
    if enc is Encoding.F64 and any("\n" in n for n in nodes):
        enc = Encoding.JSON
    if enc is Encoding.F64:
        packed_nodes: str | bytes = "\n".join(nodes).encode("utf-8")
        packed_counts: str | bytes = np.asarray(values, dtype=float).astype(_F64, copy=False).tobytes()
    else:
        arr = [None if v is None or (isinstance(v, float) and math.isnan(v)) else v for v in values]
        packed_nodes = json.dumps(list(nodes), separators=(",", ":"), ensure_ascii=False)
        packed_counts = json.dumps([_plain(v) for v in arr], separators=(",", ":"))
    return {"v": WIRE_VERSION, "type": EntryType.BATCH.value, "hour": format_hour(hour), "enc": enc.value,
            "nodes": packed_nodes, "counts": packed_counts}


def _plain(v: object) -> object:
    if v is None:
        return None
    f = float(v)  # type: ignore[arg-type]
    return int(f) if f.is_integer() else f


def encode_edge(op: str, src: str, dst: str, ts: datetime | None = None) -> dict[str, str | bytes]:
    """Fields of an edge entry (``op`` is ``add`` or ``remove``)."""
    kind = EntryType.EDGE_ADD if op == "add" else EntryType.EDGE_REMOVE
    fields: dict[str, str | bytes] = {"v": WIRE_VERSION, "type": kind.value, "src": src, "dst": dst}
    if ts is not None:
        fields["ts"] = format_hour(ts) if not (ts.minute or ts.second) else ts.isoformat()
    return fields


# --- decoding --------------------------------------------------------------------------

def _text_fields(fields: Fields) -> dict[str, bytes]:
    out: dict[str, bytes] = {}
    for key, value in fields.items():
        k = key.decode("utf-8", "replace") if isinstance(key, bytes) else str(key)
        out[k] = value if isinstance(value, bytes) else str(value).encode("utf-8")
    return out


def fields_text(fields: Fields, limit: int = 256) -> dict[str, str]:
    """The fields as short printable text, for dead-letter entries and log lines."""
    out = {}
    for key, value in _text_fields(fields).items():
        text = value[:limit].decode("utf-8", "backslashreplace")
        out[key] = text + ("..." if len(value) > limit else "")
    return out


def _need(f: dict[str, bytes], name: str) -> str:
    if name not in f:
        raise BadEntryError(f"missing field '{name}' (fields present: {', '.join(sorted(f)) or 'none'})")
    try:
        return f[name].decode("utf-8")
    except UnicodeDecodeError:
        raise BadEntryError(f"field '{name}' is not UTF-8 text") from None


def _node(f: dict[str, bytes], name: str) -> str:
    value = _need(f, name)
    if not value:
        raise BadEntryError(f"field '{name}' is empty; a node id is a non-empty string")
    return value


def _hour(f: dict[str, bytes]) -> datetime:
    try:
        return parse_hour(_need(f, "hour"))
    except ValueError as exc:
        raise BadEntryError(f"field 'hour': {exc}") from None


def _count(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise BadEntryError(f"field 'count' = {text[:40]!r} is not a number") from None
    if not math.isfinite(value) or value < 0:
        raise BadEntryError(f"field 'count' = {text[:40]!r} must be a finite number >= 0")
    return value


def _check_values(values: np.ndarray) -> None:
    with np.errstate(invalid="ignore"):
        bad = np.isinf(values) | (values < 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise BadEntryError(f"count #{i} = {values[i]!r} must be a finite number >= 0 (or missing)")


def _json_batch(f: dict[str, bytes]) -> tuple[list[str], np.ndarray]:
    try:
        nodes, counts = json.loads(f["nodes"]), json.loads(f["counts"])
    except (ValueError, UnicodeDecodeError) as exc:
        raise BadEntryError(f"batch 'nodes'/'counts' are not valid JSON: {exc}") from None
    if not isinstance(nodes, list) or not isinstance(counts, list):
        raise BadEntryError("batch 'nodes' and 'counts' must be JSON arrays")
    if not all(type(n) is str and n for n in nodes):
        raise BadEntryError("batch 'nodes' must hold non-empty strings only")
    if not all(c is None or type(c) in (int, float) for c in counts):
        bad = next(c for c in counts if not (c is None or type(c) in (int, float)))
        raise BadEntryError(f"batch count {bad!r} is not a number or null")
    return nodes, np.array(counts, dtype=float)


def _f64_batch(f: dict[str, bytes]) -> tuple[list[str], np.ndarray]:
    raw = f["counts"]
    if len(raw) % 8:
        raise BadEntryError(f"batch 'counts' has {len(raw)} bytes, not a multiple of 8 (float64)")
    try:
        nodes = PackedIds(f["nodes"].decode("utf-8").split("\n") if f["nodes"] else [], f["nodes"])
    except UnicodeDecodeError:
        raise BadEntryError("batch 'nodes' is not UTF-8 text") from None
    if "" in nodes:
        raise BadEntryError("batch 'nodes' holds an empty id (two newlines in a row?)")
    return nodes, np.frombuffer(raw, dtype=_F64)


def _batch(f: dict[str, bytes]) -> CountBatch:
    hour = _hour(f)
    enc = _need(f, "enc")
    for name in ("nodes", "counts"):
        if name not in f:
            raise BadEntryError(f"missing field '{name}' (fields present: {', '.join(sorted(f))})")
    if enc == Encoding.F64.value:
        nodes, values = _f64_batch(f)
    elif enc == Encoding.JSON.value:
        nodes, values = _json_batch(f)
    else:
        raise BadEntryError(f"unknown batch encoding enc={enc[:40]!r}; allowed: json, f64")
    if len(nodes) != values.shape[0]:
        raise BadEntryError(f"batch has {len(nodes)} node ids but {values.shape[0]} counts")
    _check_values(values)
    return CountBatch(hour, nodes, values)


def _edge(f: dict[str, bytes], kind: str) -> EdgeChange:
    ts = None
    if "ts" in f:
        try:
            ts = parse_instant(_need(f, "ts"))
        except ValueError as exc:
            raise BadEntryError(f"field 'ts': {exc}") from None
    op = "add" if kind == EntryType.EDGE_ADD.value else "remove"
    return EdgeChange(op, _node(f, "src"), _node(f, "dst"), ts)


def decode_entry(fields: Fields, max_bytes: int = DEFAULT_MAX_BYTES) -> Decoded:
    """One entry's fields to a CountBatch or an EdgeChange; BadEntryError otherwise.

    >>> decode_entry({b"type": b"count", b"node": b"/", b"hour": b"2026-11-02T07:00:00Z", b"count": b"12"})
    ... # doctest: +ELLIPSIS
    CountBatch(hour=datetime.datetime(2026, 11, 2, 7, 0, tzinfo=...), nodes=['/'], values=array([12.]))
    >>> decode_entry({b"type": b"count", b"node": b"/", b"hour": b"noon", b"count": b"-1"})
    Traceback (most recent call last):
    ...
    alerter.errors.BadEntryError: field 'hour': not an ISO 8601 time: 'noon' (expected e.g. 2026-11-02T07:00:00Z)
    """
    f = _text_fields(fields)
    size = sum(len(k) + len(v) for k, v in f.items())
    if size > max_bytes:
        raise BadEntryError(f"entry is {size} bytes, over the limit of {max_bytes} (live.max_entry_bytes)")
    version = f.get("v", WIRE_VERSION.encode())
    if version != WIRE_VERSION.encode():
        raise BadEntryError(f"unknown wire version v={version[:20]!r}; this reader knows v={WIRE_VERSION}")
    kind = _need(f, "type")
    if kind == EntryType.BATCH.value:
        return _batch(f)
    if kind == EntryType.COUNT.value:
        node, hour = _node(f, "node"), _hour(f)
        return CountBatch(hour, [node], np.array([_count(_need(f, "count"))]))
    if kind in (EntryType.EDGE_ADD.value, EntryType.EDGE_REMOVE.value):
        return _edge(f, kind)
    allowed = ", ".join(t.value for t in EntryType)
    raise BadEntryError(f"unknown entry type={kind[:40]!r}; allowed: {allowed}")


# --- partitions and the per-hour exchange ------------------------------------------------

def partition_of(node: str, partitions: int) -> int:
    """The partition that owns ``node``: a stable hash (CRC-32 of the UTF-8 id), not Python's.

    >>> partition_of("/news", 1), partition_of("/news", 4) == partition_of("/news", 4)
    (0, True)
    """
    if partitions <= 1:
        return 0
    return zlib.crc32(node.encode("utf-8")) % partitions


def pack_ids(nodes: Sequence[str]) -> bytes:
    """Node ids joined by newlines (UTF-8); a JSON array when an id itself holds a newline or
    the first id starts with ``[`` (which would read as that array).

    >>> pack_ids(["/a", "/b"])
    b'/a\\n/b'
    """
    if any("\n" in n for n in nodes) or (len(nodes) > 0 and nodes[0].startswith("[")):
        return b"[" + json.dumps(list(nodes), ensure_ascii=False)[1:].encode("utf-8")
    return "\n".join(nodes).encode("utf-8")


def unpack_ids(blob: bytes) -> list[str]:
    """The inverse of :func:`pack_ids`."""
    if blob.startswith(b"["):
        return list(json.loads(blob.decode("utf-8")))
    return blob.decode("utf-8").split("\n") if blob else []


_TABLE = b"T1"


def pack_table(ids: bytes, columns: np.ndarray) -> bytes:
    """Rows keyed by node id for the per-hour exchange: ``ids`` (from :func:`pack_ids`) and
    ``columns`` of shape (k, n), float64 little-endian, NaN kept.

    Layout: ``T1``, k and the byte length of ``ids`` as two little-endian uint32, the ids,
    then the k columns one after the other. The ids part is a separate slice so a reader can
    tell an unchanged id list by comparing bytes, and keep its index mapping.

    >>> ids, cols = unpack_table(pack_table(pack_ids(["/a", "/b"]), np.array([[1.0, np.nan]])))
    >>> ids, cols.tolist()
    (['/a', '/b'], [[1.0, nan]])
    """
    cols = np.ascontiguousarray(columns, dtype=_F64)
    if cols.ndim != 2:
        raise ValueError(f"columns must be 2-d (k, n), got shape {cols.shape}")
    head = _TABLE + np.array([cols.shape[0], len(ids)], dtype="<u4").tobytes()
    return head + ids + cols.tobytes()


def table_ids(blob: bytes) -> bytes:
    """The raw ids part of a :func:`pack_table` blob (for cache checks)."""
    _, size = _table_head(blob)
    return blob[10:10 + size]


def _table_head(blob: bytes) -> tuple[int, int]:
    if len(blob) < 10 or blob[:2] != _TABLE:
        raise ValueError(f"not an exchange table (starts {blob[:10]!r}); a worker of another version wrote it")
    k, size = np.frombuffer(blob[2:10], dtype="<u4").tolist()
    return int(k), int(size)


def unpack_table(blob: bytes, ids: list[str] | None = None) -> tuple[list[str], np.ndarray]:
    """The inverse of :func:`pack_table`: (ids, columns of shape (k, n)). Pass ``ids`` when
    they are already known (an unchanged list) to skip decoding them."""
    k, size = _table_head(blob)
    names = unpack_ids(blob[10:10 + size]) if ids is None else ids
    body = np.frombuffer(blob, dtype=_F64, offset=10 + size)
    if body.size != k * len(names):
        raise ValueError(f"exchange table holds {body.size} numbers for {k} column(s) of {len(names)} ids")
    return names, body.reshape(k, len(names))
