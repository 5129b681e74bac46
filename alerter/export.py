"""A recording of what the live service read: its input streams written back as JSON Lines.

The incident reviewer replays last week's stream. In a live deployment that stream sits in
Redis, one input stream per partition. This module reads them in stream order and follows
the service's own rules for what counts where. Edge events take effect before the first
hour later than every hour whose counts came before them. A node given twice in an hour
keeps its last count. Entries the service could not decode are left out, and so are
counts it set aside as late (their ids are in the partition's late stream). The hours of
all partitions are then written as one recording. ``alerter replay`` over it makes the
engine calls the service made, so it gives back the alerts the service raised, provided
the service also started from the stream's first entry (no older checkpoint, no trimmed
stream).

The reading and merging are pure (:func:`partition_hours`, :func:`merge_hours`,
:func:`recording_lines`); :func:`export_streams` is the thin Redis adapter around them. All
hours are held in memory until the end, because a count may arrive after a later hour's
first entries (within the close grace).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from .buckets import ClosedHour, HourBuckets
from .config import LiveSettings
from .constants import partition_name
from .errors import BadEntryError
from .recording import FORMAT, open_text
from .store import Entry, Store
from .timeaxis import HOUR, format_hour
from .wire import EdgeChange, decode_entry

__all__ = ["ExportSummary", "PartitionHours", "export_streams", "merge_hours", "partition_hours",
           "recording_lines"]

EPOCH = datetime.fromisoformat("1970-01-01T00:00:00+00:00")


@dataclass
class PartitionHours:
    """One partition's stream as the service applied it: closed hours, then trailing edges."""

    hours: list[ClosedHour] = field(default_factory=list)
    trailing: list[EdgeChange] = field(default_factory=list)
    entries: int = 0
    dead: int = 0
    late: int = 0


def partition_hours(entries: Iterable[Entry], late_ids: set[bytes], max_bytes: int) -> PartitionHours:
    """Decode one partition's entries in stream order into hours (the service's bucket rules)."""
    out, buckets = PartitionHours(), HourBuckets()
    seen: dict[str, str] = {}  # one string object per node id: held hours cost ~16 bytes a count, not ~70
    for eid, fields in entries:
        out.entries += 1
        if eid in late_ids:
            out.late += 1
            continue
        try:
            decoded = decode_entry(fields, max_bytes)
        except BadEntryError:
            out.dead += 1
            continue
        if isinstance(decoded, EdgeChange):
            buckets.add_edge(decoded)
        else:
            nodes = [seen.setdefault(node, node) for node in decoded.nodes]
            buckets.add(replace(decoded, nodes=nodes))  # nothing closes before the end: nothing is late here
    out.hours = list(buckets.close_all())
    out.trailing = buckets.take_trailing_edges()
    return out


def merge_hours(parts: Sequence[PartitionHours]) -> list[ClosedHour]:
    """All partitions' hours in hour order; within an hour, partition 0's edges and counts first."""
    by_hour: dict[datetime, ClosedHour] = {}
    for part in parts:
        for h in part.hours:
            got = by_hour.setdefault(h.hour, ClosedHour(h.hour, [], [], 0))
            got.edges.extend(h.edges)
            got.chunks.extend(h.chunks)
            got.entries += h.entries
    return [by_hour[h] for h in sorted(by_hour)]


def _count(value: float) -> int | float | None:
    if math.isnan(value):
        return None
    return int(value) if value.is_integer() else float(value)


def _edge_line(edge: EdgeChange, default_ts: datetime) -> dict[str, Any]:
    return {"type": f"edge_{edge.op}", "ts": format_hour(edge.ts or default_ts), "src": edge.src, "dst": edge.dst}


def recording_lines(hours: Sequence[ClosedHour], trailing: Sequence[EdgeChange],
                    tz: str) -> Iterator[dict[str, Any]]:
    """The recording's lines: header, then per hour its edge events and one counts line.

    An edge event without a time gets the hour the engine would give it: the one after the
    last closed hour (hour 0, 1970-01-01, before any).

    >>> def count(node, hour):
    ...     return {b"type": b"count", b"node": node, b"hour": hour, b"count": b"5"}
    >>> entries = [(b"1-0", count(b"/", b"2026-11-02T07:00:00Z")),
    ...            (b"2-0", {b"type": b"edge_add", b"src": b"/", b"dst": b"/news"}),  # no time
    ...            (b"3-0", count(b"/news", b"2026-11-02T08:00:00Z"))]
    >>> part = partition_hours(entries, set(), 1 << 20)
    >>> [(x["type"], x.get("hour") or x.get("ts")) for x in recording_lines(part.hours, [], "UTC")][1:]
    [('counts', '2026-11-02T07:00:00Z'), ('edge_add', '2026-11-02T08:00:00Z'), ('counts', '2026-11-02T08:00:00Z')]
    """
    header: dict[str, Any] = {"type": "header", "format": FORMAT, "tz": tz, "hours": len(hours)}
    if hours:
        header["start"] = format_hour(hours[0].hour)
    yield header
    last: datetime | None = None
    for h in hours:
        default_ts = last + HOUR if last is not None else EPOCH
        yield from (_edge_line(e, default_ts) for e in h.edges)
        counts: dict[str, int | float | None] = {}
        for nodes, values in h.chunks:
            for node, v in zip(nodes, np.asarray(values, dtype=float).tolist(), strict=True):
                counts[node] = _count(v)  # given again: its first place, its last count (as the service)
        yield {"type": "counts", "hour": format_hour(h.hour), "counts": counts}
        last = h.hour
    default_ts = last + HOUR if last is not None else EPOCH
    yield from (_edge_line(e, default_ts) for e in trailing)


@dataclass
class ExportSummary:
    """What one export read and wrote."""

    hours: int = 0
    counts: int = 0
    edges: int = 0
    entries: int = 0
    dead: int = 0
    late: int = 0
    partitions: int = 1

    def to_dict(self) -> dict[str, int]:
        return dict(self.__dict__)


def _entries(store: Store, stream: str, chunk: int = 10_000) -> Iterator[Entry]:
    after: bytes | str = "-"
    while True:
        got = store.entries(stream, "-", chunk) if after == "-" else store.entries_after(stream, after, chunk)
        yield from got
        if len(got) < chunk:
            return
        after = got[-1][0]


def _late_ids(store: Store, stream: str) -> set[bytes]:
    return {f[b"entry_id"] for _, f in _entries(store, stream) if b"entry_id" in f}


def _counted(entries: Iterable[Entry], tick: Callable[[int], None] | None) -> Iterator[Entry]:
    """``entries`` as they are, calling ``tick(read so far)`` every 1,000 and at the end."""
    k = 0
    for k, entry in enumerate(entries, 1):
        if tick is not None and k % 1000 == 0:
            tick(k)
        yield entry
    if tick is not None:
        tick(k)


def export_streams(store: Store, live: LiveSettings, path: str | Path, tz: str, *,
                   on_entry: Callable[[int, int | None], None] | None = None) -> ExportSummary:
    """Read every partition's input stream (and its late stream) and write one recording;
    ``on_entry(read, total)`` now and then, over all partitions' entries (for a progress bar)."""
    streams = [partition_name(live.names.input, p) for p in range(live.partitions)]
    total, done, parts = sum(store.length(s) for s in streams), 0, []
    for p, stream in enumerate(streams):
        late = _late_ids(store, partition_name(live.names.late, p))
        tick = None if on_entry is None else (lambda k, base=done: on_entry(base + k, total))
        parts.append(partition_hours(_counted(_entries(store, stream), tick), late, live.max_entry_bytes))
        done += parts[-1].entries
    hours = merge_hours(parts)
    trailing = [e for part in parts for e in part.trailing]
    summary = ExportSummary(hours=len(hours), partitions=live.partitions,
                            entries=sum(p.entries for p in parts), dead=sum(p.dead for p in parts),
                            late=sum(p.late for p in parts))
    target = Path(path)
    tmp = target.with_name(target.name + ".tmp" + target.suffix)  # a crash leaves no half recording
    with open_text(tmp, "w") as out:
        for line in recording_lines(hours, trailing, tz):
            if line["type"] == "counts":
                summary.counts += len(line["counts"])
            elif line["type"] != "header":
                summary.edges += 1
            out.write(json.dumps(line, separators=(",", ":")) + "\n")
    os.replace(tmp, target)
    return summary
