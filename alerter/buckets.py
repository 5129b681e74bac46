"""Hour buckets and when to close them: pure logic, no clock, no Redis.

Counts arrive as entries in stream order and are held per hour until the hour closes:
in live mode at the hour's end plus a grace period on the wall clock (``close_due``,
``next_close``), in drained mode as soon as the stream shows a later hour (``watermark_due``).

Edge events keep their place in the stream relative to counts, exactly as in a recording:
an edge event takes effect before the first hour that is closed after it and that is
later than every hour whose counts preceded it. So the same recording gives the same
engine calls through replay and through push + run.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from weakref import WeakKeyDictionary

import numpy as np

from .nodes import NodeIndex
from .wire import CountBatch, EdgeChange

__all__ = ["close_due", "next_close", "watermark_due", "hour_of", "HourBuckets", "ClosedHour", "dense_counts"]

HOUR = timedelta(hours=1)


def hour_of(moment: datetime) -> datetime:
    """The whole UTC hour containing ``moment``."""
    return moment.astimezone(UTC).replace(minute=0, second=0, microsecond=0)


def close_due(hour: datetime, now: datetime, grace: timedelta) -> bool:
    """Whether the hour starting at ``hour`` may close at wall-clock time ``now``.

    >>> from alerter.timeaxis import parse_hour
    >>> h = parse_hour("2026-11-02T07:00:00Z")
    >>> close_due(h, parse_hour("2026-11-02T08:00:00Z"), timedelta(minutes=5))
    False
    """
    return now >= hour + HOUR + grace


def next_close(now: datetime, grace: timedelta) -> datetime:
    """The first instant strictly after ``now`` at which some hour becomes due.

    Hours close at ``whole hour + grace``; the scheduler wakes the service then.

    >>> from alerter.timeaxis import parse_instant
    >>> next_close(parse_instant("2026-11-02T08:03:00Z"), timedelta(minutes=5)).isoformat()
    '2026-11-02T08:05:00+00:00'
    """
    candidate = hour_of(now - grace) + grace
    while candidate <= now:
        candidate += HOUR
    return candidate


def watermark_due(hour: datetime, watermark: datetime | None) -> bool:
    """Drained mode: an hour closes once the stream has shown counts of a later hour."""
    return watermark is not None and watermark > hour


# Per node index: the index arrays of id lists already interned, by their packed bytes
# (``wire.PackedIds``). Valid for ever, since interned ids never move; a restored
# checkpoint brings a new NodeIndex, hence a fresh table.
_MAPPINGS: WeakKeyDictionary[NodeIndex, dict[bytes, np.ndarray]] = WeakKeyDictionary()
_MAPPINGS_KEPT = 256  # id lists remembered per index (a few per partition and producer)


def _indices(index: NodeIndex, nodes: list[str]) -> np.ndarray:
    packed = getattr(nodes, "packed", None)
    if packed is None:
        return index.intern(nodes)
    known = _MAPPINGS.setdefault(index, {})
    hit = known.get(packed)
    if hit is None:
        if len(known) >= _MAPPINGS_KEPT:
            known.clear()
        hit = known[packed] = index.intern(nodes)
        hit.setflags(write=False)
    return hit


def dense_counts(index: NodeIndex, chunks: Sequence[tuple[list[str], np.ndarray]]) -> np.ndarray:
    """One hour's chunks as a dense array indexed like ``index`` (NaN missing).

    New ids are interned in arrival order, as a dict of the same counts would be; a node
    given twice keeps its last value. An id list unpacked from the same bytes as one seen
    before (``wire.PackedIds``) reuses that list's indices: no per-id lookup in a steady hour.

    >>> idx = NodeIndex()
    >>> dense_counts(idx, [(["/a", "/b"], np.array([1.0, 2.0])), (["/a"], np.array([5.0]))]).tolist()
    [5.0, 2.0]
    >>> from alerter.wire import PackedIds
    >>> [dense_counts(idx, [(PackedIds(["/c", "/a"], b"/c\\n/a"), np.array([7.0, v]))]).tolist() for v in (8, 9)]
    [[8.0, nan, 7.0], [9.0, nan, 7.0]]
    """
    parts = [_indices(index, nodes) for nodes, _ in chunks]
    x = np.full(len(index), np.nan)
    for idx, (_, values) in zip(parts, chunks, strict=True):
        x[idx] = values
    return x


@dataclass
class ClosedHour:
    """What the engine needs to step one hour: edges first, then the counts."""

    hour: datetime
    edges: list[EdgeChange]
    chunks: list[tuple[list[str], np.ndarray]]
    entries: int


@dataclass
class _Bucket:
    chunks: list[tuple[list[str], np.ndarray]] = field(default_factory=list)
    entries: int = 0


@dataclass
class HourBuckets:
    """Open hours, queued edge events and the closed-hour mark; pickled into checkpoints.

    >>> from alerter.timeaxis import parse_hour
    >>> b = HourBuckets()
    >>> h0, h1 = parse_hour("2026-11-02T07:00:00Z"), parse_hour("2026-11-02T08:00:00Z")
    >>> b.add(CountBatch(h0, ["/"], np.array([3.0])))
    True
    >>> b.add_edge(EdgeChange("add", "/", "/news"))
    >>> b.add(CountBatch(h1, ["/"], np.array([4.0])))
    True
    >>> [c.hour == h0 for c in b.close_ready(lambda h: watermark_due(h, b.watermark))]
    [True]
    >>> b.add(CountBatch(h0, ["/late"], np.array([1.0])))  # h0 is closed: late
    False
    >>> [(c.hour == h1, len(c.edges)) for c in b.close_all()]
    [(True, 1)]
    """

    open: dict[datetime, _Bucket] = field(default_factory=dict)
    edges: list[tuple[datetime | None, EdgeChange]] = field(default_factory=list)
    closed_through: datetime | None = None
    watermark: datetime | None = None

    def is_late(self, hour: datetime) -> bool:
        return self.closed_through is not None and hour <= self.closed_through

    def add(self, batch: CountBatch) -> bool:
        """Put counts in their hour's bucket; False (nothing kept) when the hour is closed."""
        if self.is_late(batch.hour):
            return False
        bucket = self.open.setdefault(batch.hour, _Bucket())
        bucket.chunks.append((batch.nodes, batch.values))
        bucket.entries += 1
        if self.watermark is None or batch.hour > self.watermark:
            self.watermark = batch.hour
        return True

    def add_edge(self, edge: EdgeChange) -> None:
        """Queue an edge event behind every hour whose counts came before it."""
        self.edges.append((self.watermark, edge))

    def _pop(self, hour: datetime) -> ClosedHour:
        bucket = self.open.pop(hour)
        ready = [e for tag, e in self.edges if tag is None or tag < hour]
        self.edges = [(tag, e) for tag, e in self.edges if not (tag is None or tag < hour)]
        self.closed_through = hour
        return ClosedHour(hour, ready, bucket.chunks, bucket.entries)

    def pop_ready(self, due: Callable[[datetime], bool]) -> ClosedHour | None:
        """Take the earliest open hour if ``due(hour)`` holds; one at a time, so that a
        checkpoint taken after stepping it still holds every later hour's bucket."""
        if not self.open:
            return None
        first = min(self.open)
        return self._pop(first) if due(first) else None

    def close_ready(self, due: Callable[[datetime], bool]) -> Iterator[ClosedHour]:
        """Yield, in hour order, every open hour for which ``due(hour)`` holds, popping each
        only when the previous one has been consumed."""
        while (closed := self.pop_ready(due)) is not None:
            yield closed

    def close_all(self) -> Iterator[ClosedHour]:
        """Close every open hour (end of a drained stream), lazily, in hour order."""
        return self.close_ready(lambda hour: True)

    def take_trailing_edges(self) -> list[EdgeChange]:
        """Edge events after the last counts (applied at the end of a drained stream)."""
        out = [e for _, e in self.edges]
        self.edges = []
        return out

    @property
    def open_entries(self) -> int:
        return sum(b.entries for b in self.open.values())
