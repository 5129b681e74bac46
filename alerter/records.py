"""Plain records the engine hands out: alerts, and the per-hour view of one node.

Records hold rounded plain numbers so that their JSON form is the same on every run and
every machine (the reviewer's replay must give byte-identical files).
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

__all__ = ["Alert", "NodeHour", "SpillWarning", "Upstream", "alert_from_dict", "dumps", "write_jsonl"]


def _r(value: float, digits: int = 3) -> float:
    return round(float(value), digits)


@dataclass(frozen=True)
class Upstream:
    """One upstream neighbour's estimated part in a node's excess (an estimate, not proof)."""

    node: str
    visits: float
    share: float  # of the alerting node's excess, 0..1
    link: str | None = None  # "new" or "removed" when the link changed recently

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class Alert:
    """One node beyond its forecast for one hour.

    ``upstream``, ``unexplained`` and ``origin`` are filled by the flow model:
    the neighbours that most likely sent the excess, the part none of them explains, and
    whether the surge is ``originating`` (mostly unexplained), ``propagated`` (mostly
    explained by neighbours) or ``mixed``. All of it is estimated, not observed.
    """

    node: str
    hour: str
    kind: str  # "surge" or "drop"
    observed: float
    expected: float
    band_low: float
    band_high: float
    excess: float
    ratio: float
    score: float
    rule: str
    streak: int
    upstream: tuple[Upstream, ...] = ()
    unexplained: float | None = None
    origin: str | None = None

    @classmethod
    def build(cls, *, node: str, hour: str, kind: str, observed: float, expected: float,
              band_low: float, band_high: float, score: float, rule: str, streak: int,
              upstream: tuple[Upstream, ...] = (), unexplained: float | None = None,
              origin: str | None = None) -> Alert:
        return cls(
            node=node, hour=hour, kind=kind, observed=_r(observed, 1), expected=_r(expected, 1),
            band_low=_r(band_low, 1), band_high=_r(band_high, 1),
            excess=_r(observed - expected, 1), ratio=_r((observed + 1.0) / (expected + 1.0)),
            score=_r(score, 2), rule=rule, streak=int(streak), upstream=upstream,
            unexplained=None if unexplained is None else _r(unexplained, 1), origin=origin,
        )

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class SpillWarning:
    """A node downstream of an open incident whose forecast load crosses its capacity."""

    node: str
    hour: str  # the hour the forecast is for
    forecast: float
    capacity: float
    incident: str
    via: str  # the incident member that links to it

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class NodeHour:
    """What the engine saw and expected for one node in one hour (for ``explain``)."""

    hour: str
    observed: float | None
    expected: float
    band_low: float
    band_high: float
    score: float | None
    warm: bool
    adopted: bool
    alert: str | None
    own_expected: float | None = None
    neighbours: float | None = None
    imputed: float | None = None
    upstream: tuple[Upstream, ...] = ()
    unexplained: float | None = None
    origin: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def dumps(record: Any) -> str:
    """One JSON Lines row, keys sorted, no spaces: stable bytes for stable replays."""
    data = record.to_dict() if hasattr(record, "to_dict") else record
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def alert_from_dict(data: dict[str, Any]) -> Alert:
    """An :class:`Alert` back from its ``to_dict`` form (the JSON of :func:`dumps`), for
    readers of the outbox and of the partitions' exchange.

    >>> a = Alert.build(node="/x", hour="2026-11-20T10:00:00Z", kind="surge", observed=9, expected=1,
    ...                 band_low=0, band_high=2, score=5, rule="r", streak=1, upstream=(Upstream("/", 7, 0.9),))
    >>> alert_from_dict(json.loads(dumps(a))) == a
    True
    """
    fields = dict(data)
    fields["upstream"] = tuple(Upstream(**u) for u in fields.get("upstream", ()))
    return Alert(**fields)


def write_jsonl(path: str | os.PathLike[str], records: Iterable[Any]) -> int:
    """Write records as JSON Lines atomically (temp file, then rename): no half files."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(target.name + ".tmp")
    count = 0
    with tmp.open("w", encoding="utf-8", newline="\n") as handle:
        for record in records:
            handle.write(dumps(record) + "\n")
            count += 1
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(tmp, target)
    return count
