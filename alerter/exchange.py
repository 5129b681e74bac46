"""What the workers of a partitioned run exchange per hour, and how they combine it (no I/O).

Nodes are hashed into partitions; a link lives with the partition of its destination, so a
worker holds every in-link of its own nodes, and the sources of those links that belong to
another partition as *ghosts*. To give exactly the one-worker model, three exchanges per
closed hour, each a hash in Redis with one field per partition (see ``service.py``):

1. ``own`` (before stepping): every worker publishes, for the nodes it owns, the hour's
   observed count ``x`` (NaN missing), its own seasonal expectation ``b`` and the excess
   the joint forecast persists from the previous hour; each worker fills its ghosts from
   their owners (:meth:`PartitionView.foreign`).
2. ``totals`` (inside the flow learner's step): per-source sums of positive link
   coefficients, summed over partitions in partition order, for the conservation cap
   (:meth:`PartitionView.global_totals`).
3. ``after`` (after stepping): alerts, the (node, direction) pairs beyond their band, and
   the nodes whose next-hour load crosses their capacity with their upstream sources; the
   leader (partition 0) groups all of them into incidents and spill-over warnings
   (:func:`merge_alerts`, :func:`spill_warnings`).

Every table is keyed by node id (index order differs per worker); id lists are packed once
per change of the node set and a reader keeps its index mapping while they are unchanged.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np

from .config import CapacityRule
from .engine import Engine, Foreign, StepResult
from .incidents import Incident
from .nodes import NodeIndex
from .records import Alert, SpillWarning, alert_from_dict, dumps
from .wire import pack_ids, pack_table, partition_of, table_ids, unpack_ids, unpack_table

__all__ = ["PartitionView", "After", "Candidate", "merge_alerts", "spill_warnings",
           "PHASES", "OWN", "TOTALS", "AFTER"]

OWN, TOTALS, AFTER = "own", "totals", "after"
PHASES = (OWN, TOTALS, AFTER)


@dataclass
class _Mapping:
    """Where a publisher's rows land here: local node ``local[k]`` takes their row ``theirs[k]``.
    Valid while their id list (``ids``) and the local node count (``n_local``) are unchanged."""

    ids: bytes
    n_local: int
    names: list[str]
    local: np.ndarray
    theirs: np.ndarray


class PartitionView:
    """One worker's view of the partitions: who owns each local node, packed id lists, and
    the index mappings of the other workers' tables (rebuilt only when an id list changes).

    >>> from alerter.nodes import NodeIndex
    >>> nodes = NodeIndex(); _ = nodes.intern(["/a", "/b", "/c", "/d"])
    >>> view = PartitionView(0, 2)
    >>> view.refresh(nodes)
    >>> [nodes.ids[i] for i in np.flatnonzero(view.ghost)], view.owner.tolist()
    (['/d'], [0, 0, 0, 1])
    """

    def __init__(self, partition: int, partitions: int) -> None:
        self.partition, self.partitions = partition, partitions
        self.owner = np.zeros(0, np.int64)
        self.ghost = np.zeros(0, bool)
        self.capacity = np.zeros(0)
        self._own_ids = b""
        self._all_ids = b""
        self._maps: dict[tuple[str, int], _Mapping] = {}
        self._adopted: dict[int, bytes] = {}
        self._n = 0

    def refresh(self, nodes: NodeIndex, rules: Sequence[CapacityRule] = ()) -> None:
        """Extend the per-node arrays to nodes interned since the last call (ids never move):
        owner partition, ghost mask, capacity (NaN: no capacity rule matches)."""
        n = len(nodes)
        if n == self._n:
            return
        fresh = nodes.ids[self._n:n]
        self.owner = np.concatenate([self.owner, np.fromiter(
            (partition_of(i, self.partitions) for i in fresh), np.int64, len(fresh))])
        caps = [next((r.visits_per_hour for r in rules if r.matches(i)), np.nan) for i in fresh]
        self.capacity = np.concatenate([self.capacity, np.asarray(caps, float)])
        self.ghost = self.owner != self.partition
        self._own_ids = pack_ids([nodes.ids[i] for i in self.owned.tolist()])
        self._all_ids = pack_ids(nodes.ids[:n])
        self._n = n

    @property
    def owned(self) -> np.ndarray:
        return np.flatnonzero(~self.ghost)

    # -- phase 1 -----------------------------------------------------------------------
    def own_table(self, x: np.ndarray, own: np.ndarray, prev_excess: np.ndarray) -> bytes:
        """This worker's phase-1 rows: (x, b, persisted excess) of the nodes it owns."""
        idx = self.owned
        return pack_table(self._own_ids, np.stack([x[idx], own[idx], prev_excess[idx]]))

    def adopt_ids(self, nodes: NodeIndex, tables: dict[int, bytes]) -> int:
        """Intern every node the other partitions own (the ids of their phase-1 tables); returns
        how many were new here.

        Every worker mirrors every node's baseline (fed with the owners' counts), so that a
        node starting late borrows the seasonal profile of the same population of warm nodes
        as on one worker; only the links, the expensive part, are split by partition.
        """
        before = len(nodes)
        for p, blob in sorted(tables.items()):
            ids = table_ids(blob)
            if self._adopted.get(p) != ids:
                nodes.intern(unpack_ids(ids))
                self._adopted[p] = ids
        return len(nodes) - before

    def foreign(self, nodes: NodeIndex, x: np.ndarray, tables: dict[int, bytes]) -> tuple[Foreign, np.ndarray]:
        """Fill the ghosts' counts in ``x`` (in place) from their owners' phase-1 tables.

        Returns the :class:`Foreign` for ``step_array`` and the ghosts' persisted excess
        (for ``Engine.adopt_excess``). A ghost its owner does not know has never been
        counted: missing count, expectation 0, no excess, as in the one-worker engine.
        """
        n = len(nodes)
        own, prev = np.zeros(n), np.zeros(n)
        x[self.ghost] = np.nan
        for p, blob in sorted(tables.items()):
            if p == self.partition:
                continue
            m = self._mapping(OWN, p, blob, nodes, self.ghost & (self.owner == p))
            _, cols = unpack_table(blob, m.names)
            x[m.local] = cols[0, m.theirs]
            own[m.local] = cols[1, m.theirs]
            prev[m.local] = cols[2, m.theirs]
        return Foreign(self.ghost.copy(), own), prev

    # -- phase 2 -----------------------------------------------------------------------
    def totals_table(self, totals: np.ndarray) -> bytes:
        """This worker's per-source coefficient sums over all its local nodes (ghosts too)."""
        return pack_table(self._all_ids, np.asarray(totals, np.float64)[None, :])

    def global_totals(self, nodes: NodeIndex, mine: np.ndarray, tables: dict[int, bytes]) -> np.ndarray:
        """Every partition's totals summed per local node, added in partition order, so all
        workers add the same numbers in the same order and agree on every source's total."""
        out = np.zeros(len(nodes))
        for p in range(self.partitions):
            if p == self.partition:
                out += mine
                continue
            blob = tables[p]
            m = self._mapping(TOTALS, p, blob, nodes, None)
            _, cols = unpack_table(blob, m.names)
            out[m.local] += cols[0, m.theirs]
        return out

    def _mapping(self, phase: str, p: int, blob: bytes, nodes: NodeIndex, want: np.ndarray | None) -> _Mapping:
        ids, n = table_ids(blob), len(nodes)
        hit = self._maps.get((phase, p))
        if hit is not None and hit.n_local == n and hit.ids == ids:
            return hit
        names = unpack_ids(ids)
        if want is None:  # every id of theirs known here
            pairs = [(nodes.get(name), k) for k, name in enumerate(names) if name in nodes]
        else:  # the wanted local nodes that they publish
            pos = {name: k for k, name in enumerate(names)}
            pairs = [(i, pos[nodes.ids[i]]) for i in np.flatnonzero(want).tolist() if nodes.ids[i] in pos]
        local = np.array([a for a, _ in pairs], np.int64)
        theirs = np.array([b for _, b in pairs], np.int64)
        m = self._maps[(phase, p)] = _Mapping(ids, n, names, local, theirs)
        return m

    # -- phase 3 -----------------------------------------------------------------------
    def after(self, engine: Engine, result: StepResult, spills: bool) -> After:
        """This worker's phase-3 record: its alerts, its own nodes beyond their band, and (when
        spill-over warnings are on) its own nodes whose next-hour load crosses capacity."""
        ids = engine.nodes.ids
        active = [(ids[i], d) for d in ("surge", "drop")
                  for i in np.flatnonzero(engine.rules.active[d] & ~self.ghost).tolist()]
        candidates = []
        if spills:
            load = engine.next_load(result.hour)
            with np.errstate(invalid="ignore"):
                over = np.flatnonzero(~self.ghost & (load > self.capacity))
            candidates = [Candidate(ids[i], round(float(load[i]), 1), float(self.capacity[i]),
                                    tuple(engine.graph.neighbours(ids[i], "up"))) for i in over.tolist()]
        return After(list(result.alerts), active, candidates)


@dataclass(frozen=True)
class Candidate:
    """A node whose forecast load for the next hour crosses its capacity, with its sources."""

    node: str
    load: float
    capacity: float
    upstream: tuple[str, ...]


@dataclass
class After:
    """One partition's phase-3 record of an hour (JSON on the wire; alerts as records)."""

    alerts: list[Alert] = field(default_factory=list)
    active: list[tuple[str, str]] = field(default_factory=list)
    candidates: list[Candidate] = field(default_factory=list)

    def pack(self) -> bytes:
        data = {"alerts": [dumps(a) for a in self.alerts], "active": self.active,
                "candidates": [[c.node, c.load, c.capacity, list(c.upstream)] for c in self.candidates]}
        return json.dumps(data, separators=(",", ":"), ensure_ascii=False).encode("utf-8")

    @classmethod
    def unpack(cls, blob: bytes) -> After:
        data = json.loads(blob.decode("utf-8"))
        return cls([alert_from_dict(json.loads(a)) for a in data["alerts"]],
                   [(n, d) for n, d in data["active"]],
                   [Candidate(n, float(v), float(c), tuple(u)) for n, v, c, u in data["candidates"]])


def merge_alerts(afters: Iterable[After]) -> list[Alert]:
    """All partitions' alerts of one hour in the engine's order: (kind, node)."""
    return sorted((a for after in afters for a in after.alerts), key=lambda a: (a.kind, a.node))


def spill_warnings(next_hour: str, incidents: Iterable[Incident],
                   candidates: Iterable[Candidate]) -> list[SpillWarning]:
    """Spill-over warnings of the open surge incidents, as ``Engine._spills`` gives them on one
    worker: a node over capacity, downstream of a member and not itself one; ``via`` is the
    last such member in id order (the one the engine's loop keeps); sorted by (incident, node).

    >>> inc = Incident("surge-1", "surge", "h", 0, members={"/a": None, "/b": None})
    >>> spill_warnings("h1", [inc], [Candidate("/c", 900.0, 500.0, ("/a", "/b", "/z"))])
    [SpillWarning(node='/c', hour='h1', forecast=900.0, capacity=500.0, incident='surge-1', via='/b')]
    """
    found = list(candidates)
    out = []
    for inc in incidents:
        if inc.direction != "surge":
            continue
        for c in found:
            via = [u for u in c.upstream if u in inc.members]
            if via and c.node not in inc.members:
                out.append(SpillWarning(c.node, next_hour, c.load, c.capacity, inc.id, max(via)))
    return sorted(out, key=lambda w: (w.incident, w.node))
