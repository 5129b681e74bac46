"""The producer: a recording (alerter-recording/1) into Redis Streams, in batch entries.

Events keep their recording order inside each partition's stream: edge events go to the
partition of their destination node, counts are split by node partition and packed into
``f64`` batch entries of at most ``live.batch_size`` counts. With more than one partition
every partition receives a (possibly empty) batch for every hour, so every worker sees
every hour and the per-hour barrier completes. One pipelined round trip per hour.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np

from .config import LiveSettings
from .constants import Encoding, partition_name
from .recording import CountsEvent, EdgeEvent, Header, read_recording
from .store import FieldsIn, Store
from .wire import encode_batch, encode_edge, partition_of

__all__ = ["PushSummary", "push_recording", "batch_entries", "Pacer"]

log = logging.getLogger(__name__)


@dataclass
class PushSummary:
    """What one push wrote."""

    hours: int = 0
    counts: int = 0
    edges: int = 0
    entries: int = 0
    seconds: float = 0.0


def batch_entries(hour: datetime, nodes: list[str], values: np.ndarray, size: int) -> list[dict[str, str | bytes]]:
    """Batch entries of at most ``size`` counts each (one empty batch if there are none)."""
    if not nodes:
        return [encode_batch(hour, [], np.empty(0), Encoding.F64)]
    return [encode_batch(hour, nodes[i:i + size], values[i:i + size], Encoding.F64)
            for i in range(0, len(nodes), size)]


class Pacer:
    """Waits so that recording hours go out ``speed`` times faster than real time (0: no wait).

    >>> Pacer(0.0).delay(5) == 0.0
    True
    >>> Pacer(3600.0).delay(2, elapsed=0.5)
    1.5
    """

    def __init__(self, speed: float, sleep: Callable[[float], None] = time.sleep) -> None:
        self.speed, self.sleep, self.t0 = speed, sleep, time.monotonic()

    def delay(self, hours_done: int, elapsed: float | None = None) -> float:
        if self.speed <= 0:
            return 0.0
        spent = time.monotonic() - self.t0 if elapsed is None else elapsed
        return max(0.0, hours_done * 3600.0 / self.speed - spent)

    def wait(self, hours_done: int) -> None:
        wait = self.delay(hours_done)
        if wait > 0:
            self.sleep(wait)


def _split(event: CountsEvent, parts: int) -> list[tuple[list[str], np.ndarray]]:
    nodes = list(event.counts)
    values = np.array([np.nan if v is None else v for v in event.counts.values()], dtype=float)
    if parts == 1:
        return [(nodes, values)]
    owner = np.array([partition_of(n, parts) for n in nodes], dtype=np.int64)
    out = []
    for p in range(parts):
        idx = np.flatnonzero(owner == p)
        out.append(([nodes[i] for i in idx.tolist()], values[idx]))
    return out


def push_recording(path: str | Path, store: Store, live: LiveSettings, *, speed: float = 0.0,
                   on_progress: Callable[[int, int | None], None] | None = None,
                   sleep: Callable[[float], None] = time.sleep) -> PushSummary:
    """Send a whole recording; ``on_progress(hours_done, hours_total)`` after every hour."""
    parts = live.partitions
    streams = [partition_name(live.names.input, p) for p in range(parts)]
    pending: list[tuple[str, FieldsIn]] = []
    summary, pacer, total = PushSummary(), Pacer(speed, sleep), None
    t0 = time.perf_counter()

    def flush() -> None:
        for stream in dict.fromkeys(s for s, _ in pending):
            store.append(stream, [f for s, f in pending if s == stream])
        summary.entries += len(pending)
        pending.clear()

    for event in read_recording(path):
        if isinstance(event, Header):
            total = event.hours
        elif isinstance(event, EdgeEvent):
            stream = streams[partition_of(event.dst, parts)]
            pending.append((stream, encode_edge(event.op, event.src, event.dst, event.ts)))
            summary.edges += 1
        elif isinstance(event, CountsEvent):
            for p, (nodes, values) in enumerate(_split(event, parts)):
                pending.extend((streams[p], e) for e in batch_entries(event.hour, nodes, values, live.batch_size))
                summary.counts += len(nodes)
            flush()
            summary.hours += 1
            if on_progress is not None:
                on_progress(summary.hours, total)
            pacer.wait(summary.hours)
    flush()
    summary.seconds = time.perf_counter() - t0
    log.info("push done file=%s hours=%d counts=%d edges=%d entries=%d took_ms=%.0f", path, summary.hours,
             summary.counts, summary.edges, summary.entries, summary.seconds * 1000)
    return summary
