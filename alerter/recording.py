"""Recordings: JSON Lines (optionally gzip), one timestamped event per line.

Line kinds (``type``):

- ``header``: ``{"type":"header","format":"alerter-recording/1","tz":...,"start":...,"hours":N}``
  (optional, first line only);
- ``counts``: ``{"type":"counts","hour":"2026-11-02T07:00:00Z","counts":{"/":123,...}}``,
  the visits of each node in the hour starting then; a node left out (or ``null``) is
  missing for that hour;
- ``edge_add`` / ``edge_remove``: ``{"type":"edge_add","ts":...,"src":"/","dst":"/news"}``,
  taking effect for the counts lines that follow.

Reading is strict: a malformed line raises RecordingError naming file and line, unless the
caller asks to skip bad lines, in which case each is reported and skipped.
"""

from __future__ import annotations

import gzip
import json
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from .errors import RecordingError
from .timeaxis import format_hour, parse_hour, parse_instant

__all__ = ["Header", "CountsEvent", "EdgeEvent", "Event", "read_recording", "open_text", "FORMAT"]

FORMAT = "alerter-recording/1"
EVENT_TYPES = ("header", "counts", "edge_add", "edge_remove")


@dataclass(frozen=True)
class Header:
    format: str
    tz: str | None
    start: datetime | None
    hours: int | None
    site: str | None


@dataclass(frozen=True)
class CountsEvent:
    hour: datetime
    counts: dict[str, float | None]


@dataclass(frozen=True)
class EdgeEvent:
    op: str  # "add" or "remove"
    ts: datetime
    src: str
    dst: str


Event = Header | CountsEvent | EdgeEvent


def open_text(path: Path, mode: str = "r") -> Any:
    """Open a text file to read (``mode="r"``) or write (``"w"``), gzipping ``.gz`` either way."""
    if path.suffix == ".gz":
        return gzip.open(path, mode + "t", encoding="utf-8")
    return path.open(mode, encoding="utf-8")


def _node_id(value: Any, key: str) -> str:
    if not isinstance(value, str) or not value:
        raise ValueError(f"'{key}' must be a non-empty string node id, got {value!r}")
    return value


def _count(node: str, value: Any) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"count of {node!r} must be a number or null, got {value!r}")
    if not math.isfinite(value) or value < 0:
        raise ValueError(f"count of {node!r} must be a finite number >= 0, got {value!r}")
    return float(value)


def _parse_counts(obj: dict[str, Any]) -> CountsEvent:
    if "hour" not in obj:
        raise ValueError("counts line has no 'hour'")
    counts = obj.get("counts")
    if not isinstance(counts, dict):
        raise ValueError("counts line needs 'counts': an object mapping node id to count")
    return CountsEvent(parse_hour(obj["hour"]),
                       {_node_id(k, "counts key"): _count(k, v) for k, v in counts.items()})


def _parse_edge(obj: dict[str, Any]) -> EdgeEvent:
    if "ts" not in obj:
        raise ValueError(f"{obj['type']} line has no 'ts'")
    op = "add" if obj["type"] == "edge_add" else "remove"
    return EdgeEvent(op, parse_instant(obj["ts"]), _node_id(obj.get("src"), "src"),
                     _node_id(obj.get("dst"), "dst"))


def _parse_header(obj: dict[str, Any]) -> Header:
    fmt = obj.get("format")
    if fmt != FORMAT:
        raise ValueError(f"unsupported recording format {fmt!r}; this version reads {FORMAT!r}")
    start = parse_hour(obj["start"]) if obj.get("start") else None
    hours = obj.get("hours")
    return Header(fmt, obj.get("tz"), start, int(hours) if hours is not None else None, obj.get("site"))


def parse_line(text: str, first: bool = True) -> Event:
    """One line to one event; ValueError with a human reason otherwise."""
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ValueError(f"not valid JSON ({exc.msg} at column {exc.colno})") from exc
    if not isinstance(obj, dict):
        raise ValueError("each line must be a JSON object")
    kind = obj.get("type")
    if kind == "counts":
        return _parse_counts(obj)
    if kind in ("edge_add", "edge_remove"):
        return _parse_edge(obj)
    if kind == "header":
        if not first:
            raise ValueError("a header may only be the first line")
        return _parse_header(obj)
    raise ValueError(f"unknown line type {kind!r}; allowed: {', '.join(EVENT_TYPES)}")


def read_recording(path: str | Path, skip_bad: bool = False,
                   on_bad: Callable[[RecordingError], None] | None = None) -> Iterator[Event]:
    """Yield the events of a recording in file order.

    With ``skip_bad`` a malformed line is passed to ``on_bad`` and skipped; without it the
    first malformed line raises RecordingError (file and line number in the message).
    """
    path = Path(path)
    if not path.exists():
        raise RecordingError(str(path), None, "no such file; pass the path of a .jsonl or .jsonl.gz recording")
    try:
        with open_text(path) as handle:
            last: datetime | None = None
            for number, text in enumerate(handle, start=1):
                if not text.strip():
                    continue
                try:
                    event = parse_line(text, first=number == 1)
                    if isinstance(event, CountsEvent):
                        if last is not None and event.hour <= last:
                            hour = format_hour(event.hour)
                            raise ValueError(f"hour {hour} is not after the previous counts line")
                        last = event.hour
                except (ValueError, KeyError, TypeError) as exc:
                    error = RecordingError(str(path), number, str(exc))
                    if not skip_bad:
                        raise error from None
                    if on_bad is not None:
                        on_bad(error)
                    continue
                yield event
    except (OSError, EOFError, UnicodeDecodeError) as exc:
        raise RecordingError(str(path), None, f"cannot read: {exc}") from exc

