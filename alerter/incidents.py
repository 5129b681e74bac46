"""Incidents: alerts linked by attribution grouped into one story with a root.

An alert on node i that names an upstream neighbour j (with at least ``link_min_share`` of
i's excess) is linked to j when j is beyond its band in the same or the previous
``adjacent_hours`` hours. Linked alerts, and alerts on nodes already in an open incident,
form one incident. The root is the member with the largest unexplained excess (the part no
neighbour explains): the likeliest origin of the cascade, an estimate, not a proof.

Lifecycle per incident: ``open`` when created, ``growing`` in an hour that adds members,
``open`` again while members stay beyond their band, ``subsiding`` in an hour when none
is, ``closed`` after ``quiet_hours`` hours with none. One update record is emitted for
each change, so a chat sink can post one message per incident and edit it as it grows.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass, field
from enum import StrEnum
from typing import Any

from .records import Alert

__all__ = ["Active", "IncidentState", "Incident", "IncidentUpdate", "IncidentTracker"]

Active = set[tuple[str, str]] | Callable[[str, str], "int | None"]
"""Who is beyond the band this hour: a set of (node, direction), or a last-tick lookup."""


class IncidentState(StrEnum):
    OPEN = "open"
    GROWING = "growing"
    SUBSIDING = "subsiding"
    CLOSED = "closed"


@dataclass
class Member:
    first_hour: str
    last_active: int
    excess: float = 0.0
    unexplained: float = 0.0
    alerts: int = 0


@dataclass
class Incident:
    """The mutable state of one incident."""

    id: str
    direction: str
    start: str
    start_tick: int
    members: dict[str, Member] = field(default_factory=dict)
    root: str = ""
    state: IncidentState = IncidentState.OPEN
    last_update: str = ""
    last_active: int = 0
    revision: int = 0

    @property
    def total_excess(self) -> float:
        return round(sum(m.excess for m in self.members.values()), 1)

    def pick_root(self) -> None:
        """Largest unexplained excess; ties by earliest member, then id order."""
        ranked = sorted(self.members.items(),
                        key=lambda kv: (-abs(kv[1].unexplained), kv[1].first_hour, kv[0]))
        self.root = ranked[0][0]


@dataclass(frozen=True)
class IncidentUpdate:
    """A record of one change to an incident: what a chat message would say."""

    incident: str
    revision: int
    hour: str
    state: str
    direction: str
    root: str
    start: str
    members: tuple[str, ...]
    new_members: tuple[str, ...]
    total_excess: float

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


class _Groups:
    """Union-find over string keys, deterministic in insertion order."""

    def __init__(self) -> None:
        self.parent: dict[str, str] = {}

    def find(self, key: str) -> str:
        self.parent.setdefault(key, key)
        while self.parent[key] != key:
            self.parent[key] = self.parent[self.parent[key]]
            key = self.parent[key]
        return key

    def union(self, a: str, b: str) -> None:
        ra, rb = self.find(a), self.find(b)
        if ra != rb:
            self.parent[max(ra, rb)] = min(ra, rb)

    def groups(self) -> dict[str, list[str]]:
        out: dict[str, list[str]] = {}
        for key in self.parent:
            out.setdefault(self.find(key), []).append(key)
        return out


def _incident_id(direction: str, hour: str, nodes: Iterable[str]) -> str:
    digest = hashlib.sha1("\n".join(sorted(nodes)).encode()).hexdigest()[:6]
    return f"{direction}-{hour[:13].replace('-', '').replace('T', 'T')}-{digest}"


class IncidentTracker:
    """Groups each hour's alerts into incidents and reports what changed.

    >>> from alerter.records import Alert, Upstream
    >>> def alert(node, up=()):
    ...     return Alert.build(node=node, hour="2026-11-20T10:00:00Z", kind="surge", observed=900,
    ...                        expected=100, band_low=50, band_high=200, score=9, rule="r", streak=1,
    ...                        upstream=up, unexplained=0.0 if up else 800.0)
    >>> t = IncidentTracker()
    >>> ups = t.step(0, "2026-11-20T10:00:00Z", [alert("/s"), alert("/s/a", (Upstream("/s", 700, 0.9),))],
    ...              active={("/s", "surge"), ("/s/a", "surge")})
    >>> [(u.state, u.root, u.members) for u in ups]
    [('open', '/s', ('/s', '/s/a'))]
    """

    def __init__(self, link_min_share: float = 0.2, adjacent_hours: int = 1, quiet_hours: int = 3) -> None:
        self.link_min_share = link_min_share
        self.adjacent_hours = adjacent_hours
        self.quiet_hours = quiet_hours
        self.open: dict[str, Incident] = {}
        self.recent_active: dict[tuple[str, str], int] = {}
        self._lookup: Callable[[str, str], int | None] | None = None
        self._members: dict[tuple[str, str], Incident] | None = None  # (node, direction) -> open incident

    def _owner(self, node: str, direction: str) -> Incident | None:
        """The open incident holding ``node`` in ``direction`` (an index built once, then kept
        up to date as members join, incidents merge and close)."""
        if self._members is None:
            self._members = {(m, inc.direction): inc for inc in self.open.values() for m in inc.members}
        return self._members.get((node, direction))

    def _link(self, groups: _Groups, alert: Alert, tick: int) -> None:
        key = f"n:{alert.node}"
        groups.find(key)
        owner = self._owner(alert.node, alert.kind)
        if owner is not None:
            groups.union(key, f"i:{owner.id}")
        for up in alert.upstream:
            if up.share < self.link_min_share:
                continue
            seen = self._last_beyond(up.node, alert.kind)
            if seen is None or tick - seen > self.adjacent_hours:
                continue
            up_owner = self._owner(up.node, alert.kind)
            groups.union(key, f"i:{up_owner.id}" if up_owner else f"n:{up.node}")

    def step(self, tick: int, hour: str, alerts: list[Alert], active: Active) -> list[IncidentUpdate]:
        """One closed hour: its alerts, and which (node, direction) pairs are beyond their band.

        ``active`` is either the set of such pairs this hour, or a lookup
        ``last_beyond(node, direction) -> tick or None`` (the last hour the node was beyond
        its band that way; the engine keeps it as arrays, so no per-node set is built).
        """
        if callable(active):
            lookup = active
        else:
            for key in active:
                self.recent_active[key] = tick
            lookup = None
        self._lookup = lookup
        for a in alerts:
            self.recent_active[(a.node, a.kind)] = tick
        by_direction: dict[str, list[Alert]] = {}
        for a in alerts:
            by_direction.setdefault(a.kind, []).append(a)
        changed: dict[str, tuple[str, ...]] = {}
        for direction, group in sorted(by_direction.items()):
            changed.update(self._group(tick, hour, direction, group))
        self._touch_members(tick)
        updates = self._lifecycle(tick, hour, changed)
        self.recent_active = {k: v for k, v in self.recent_active.items() if tick - v <= self.adjacent_hours}
        self._lookup = None
        return updates

    def _last_beyond(self, node: str, direction: str) -> int | None:
        """The last tick ``node`` was beyond its band in ``direction`` (alerts included)."""
        seen = self.recent_active.get((node, direction))
        other = self._lookup(node, direction) if self._lookup is not None else None
        if seen is None or (other is not None and other > seen):
            return other
        return seen

    def _group(self, tick: int, hour: str, direction: str, alerts: list[Alert]) -> dict[str, tuple[str, ...]]:
        groups = _Groups()
        for a in alerts:
            self._link(groups, a, tick)
        by_node = {a.node: a for a in alerts}
        changed: dict[str, tuple[str, ...]] = {}
        for keys in groups.groups().values():
            incidents = sorted((self.open[k[2:]] for k in keys if k.startswith("i:")),
                               key=lambda inc: (inc.start_tick, inc.id))
            nodes = sorted(k[2:] for k in keys if k.startswith("n:"))
            if incidents:
                target = incidents[0]
                for other in incidents[1:]:
                    self._absorb(target, other)
            else:
                target = Incident(_incident_id(direction, hour, nodes), direction, hour, tick)
                self.open[target.id] = target
            new = self._add_members(target, nodes, by_node, hour, tick)
            if new or target.id not in changed:
                changed[target.id] = tuple(sorted(set(changed.get(target.id, ())) | set(new)))
        return changed

    def _add_members(self, inc: Incident, nodes: list[str], by_node: dict[str, Alert],
                     hour: str, tick: int) -> list[str]:
        new = []
        for node in nodes:
            a = by_node.get(node)
            member = inc.members.get(node)
            if member is None:
                member = inc.members[node] = Member(first_hour=hour, last_active=tick)
                new.append(node)
                if self._members is not None:
                    self._members[(node, inc.direction)] = inc
            if a is not None:
                member.excess += a.excess
                member.unexplained += a.excess if a.unexplained is None else a.unexplained
                member.alerts += 1
                member.last_active = tick
        inc.last_active = tick
        return new

    def _absorb(self, target: Incident, other: Incident) -> None:
        for node, member in other.members.items():
            mine = target.members.setdefault(node, Member(member.first_hour, member.last_active))
            if mine is not member:
                mine.excess += member.excess
                mine.unexplained += member.unexplained
                mine.alerts += member.alerts
                mine.last_active = max(mine.last_active, member.last_active)
            if self._members is not None:
                self._members[(node, target.direction)] = target
        del self.open[other.id]

    def _touch_members(self, tick: int) -> None:
        """Members beyond their band this hour (with or without an alert) keep their incident
        active. With a lookup that can list who is beyond at a tick (``beyond_at``), only
        those nodes are visited; otherwise every member of every open incident."""
        beyond_at = getattr(self._lookup, "beyond_at", None)
        if beyond_at is not None:
            pairs = {k for k, v in self.recent_active.items() if v == tick}
            pairs.update(beyond_at(tick))
            for node, direction in pairs:
                inc = self._owner(node, direction)
                if inc is not None and node in inc.members:
                    inc.members[node].last_active = tick
                    inc.last_active = tick
            return
        for inc in self.open.values():
            for node, member in inc.members.items():
                if self._last_beyond(node, inc.direction) == tick:
                    member.last_active = tick
                    inc.last_active = tick

    def _lifecycle(self, tick: int, hour: str, changed: dict[str, tuple[str, ...]]) -> list[IncidentUpdate]:
        updates = []
        for inc in sorted(self.open.values(), key=lambda i: (i.start_tick, i.id)):
            new = changed.get(inc.id)
            state = self._state(inc, tick, new)
            root_before = inc.root
            if new is not None or not inc.root:  # members' figures change only with alerts or merges
                inc.pick_root()
            if state == inc.state and not new and inc.root == root_before and inc.revision > 0:
                continue
            inc.state, inc.last_update = state, hour
            inc.revision += 1
            updates.append(IncidentUpdate(
                incident=inc.id, revision=inc.revision, hour=hour, state=state.value,
                direction=inc.direction, root=inc.root, start=inc.start,
                members=tuple(sorted(inc.members)), new_members=new or (), total_excess=inc.total_excess,
            ))
        for inc in [i for i in self.open.values() if i.state == IncidentState.CLOSED]:
            self._close(inc)
        return updates

    def _state(self, inc: Incident, tick: int, new: tuple[str, ...] | None) -> IncidentState:
        """This hour's state: ``new`` is None when no alert joined it this hour."""
        if new is not None:
            return IncidentState.OPEN if inc.revision == 0 or not new else IncidentState.GROWING
        if inc.last_active == tick:
            return IncidentState.OPEN
        if tick - inc.last_active >= self.quiet_hours:
            return IncidentState.CLOSED
        return IncidentState.SUBSIDING

    def _close(self, inc: Incident) -> None:
        del self.open[inc.id]
        if self._members is not None:
            for m in inc.members:
                if self._members.get((m, inc.direction)) is inc:
                    del self._members[(m, inc.direction)]
