"""The live directed link graph, stored as flat numpy arrays of edge slots.

Why slots: per-edge state (learned flow coefficients, ...) must stay aligned with the edges
while pages and links come and go, and the per-hour path must be a handful of vectorised
passes over 20M+ edges. A Python graph object cannot do either at that size.

Layout (the choice, and why): slots ``0..main-1`` are the *main segment*, sorted by
``key = dst << 32 | src``, so a lookup is one ``searchsorted`` and a compacted graph's
destination-sorted CSR is the identity order (views, no copy). Later additions form an
unsorted *tail* (found through a small dict); removal only clears ``alive`` (a dead mask).
``csr()`` and compaction are *splices*: the main segment is cut at the dead slots and at
the insertion points of the sorted tail and re-joined by one ``np.concatenate`` per array,
so pending changes cost a sequential copy, never an ``O(E log E)`` re-sort. Compaction
(drop dead, merge tail) renumbers slots, moves every registered array in the same splice
and bumps ``generation``; it runs only at the start of ``add_edge``/``remove_edge`` once the
tail or the dead count passes its threshold (amortised), or on ``compact()``. Reads never
renumber, so slot numbers are stable between mutations. ``sum_into_dst`` needs no CSR:
``np.add.reduceat`` over the main segment plus ``np.add.at`` over the tail; at 22M edges
it beat ``np.bincount`` (``benchmarks/bench_graph.py``).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from .nodes import NodeIndex

__all__ = ["LinkGraph", "CSRView"]

_SHIFT = np.int64(32)
_DIRECTIONS = ("up", "down")


@dataclass(frozen=True)
class CSRView:
    """Alive edges sorted by destination: in-edges of node ``v`` are ``indptr[v]:indptr[v+1]``."""

    order: np.ndarray  # slot indices (int32 below 2**31 slots, else int64), stable by dst
    indptr: np.ndarray  # int64, n_nodes + 1
    src_sorted: np.ndarray  # int32
    dst_sorted: np.ndarray  # int32


Plan = list[tuple[bool, int, int]]


def _keys(src: np.ndarray, dst: np.ndarray) -> np.ndarray:
    return (dst.astype(np.int64) << _SHIFT) | src.astype(np.int64)


def _self_loop(node: str) -> ValueError:
    return ValueError(f"self-loop on node {node!r} rejected: a page linking to itself is not an edge")


def _readonly(*arrays: np.ndarray) -> None:
    for a in arrays:
        a.flags.writeable = False


def _splice_plan(m: int, drop: np.ndarray, at: np.ndarray) -> Plan:
    """Pieces rebuilding ``base[:m]`` without positions ``drop``, with ``new[i]`` just before ``base[at[i]]``.

    Each piece is ``(from_base, start, stop)``; ``at`` is non-decreasing. Python work is
    proportional to the number of changes, not to ``m``.
    """
    pos = np.concatenate([at, drop]).astype(np.int64)
    is_drop = np.concatenate([np.zeros(at.size, bool), np.ones(drop.size, bool)])  # inserts go first
    idx = np.concatenate([np.arange(at.size), np.zeros(drop.size, np.int64)])
    ev = np.lexsort((is_drop, pos))
    plan: Plan = []
    prev = 0
    for p, dropped, i in zip(pos[ev].tolist(), is_drop[ev].tolist(), idx[ev].tolist(), strict=True):
        if p > prev:
            plan.append((True, prev, p))
            prev = p
        if dropped:
            prev = p + 1
        elif plan and not plan[-1][0] and plan[-1][2] == i:
            plan[-1] = (False, plan[-1][1], i + 1)  # consecutive inserts: one piece
        else:
            plan.append((False, i, i + 1))
    if prev < m:
        plan.append((True, prev, m))
    return plan


def _hours32(hour: int | np.ndarray) -> np.ndarray:
    """Link birth hours (hour indices) as int32, the type the graph stores: half the bytes."""
    if isinstance(hour, int) and -(2**31) <= hour < 2**31:  # one edge event: no array round trip
        return np.int32(hour)  # type: ignore[return-value]
    h = np.asarray(hour, dtype=np.int64)
    if h.size and (h.min() < -(2**31) or h.max() >= 2**31):
        raise ValueError(f"link birth hour {int(h.min() if h.min() < 0 else h.max())} is outside the int32 range "
                         "of hour indices (hours since 1970-01-01)")
    return h.astype(np.int32)


def _splice(plan: Plan, base: np.ndarray, new: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """Apply a splice plan along the last axis with one ``np.concatenate``."""
    pieces = [(base if from_base else new)[..., i:j] for from_base, i, j in plan]
    if not pieces:
        return base[..., :0].copy() if out is None else out
    return np.concatenate(pieces, axis=-1, out=out)


def _segments(indptr: np.ndarray, values: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Concatenation of ``values[indptr[r]:indptr[r+1]]`` over ``rows``, without a Python loop."""
    starts, lens = indptr[rows], indptr[rows + 1] - indptr[rows]
    total = int(lens.sum())
    if total == 0:
        return values[:0]
    shift = np.repeat(starts - np.cumsum(lens) + lens, lens)
    return values[shift + np.arange(total)]


def _extend_indptr(indptr: np.ndarray, n: int) -> np.ndarray:
    """Indptr for ``n`` nodes when nodes interned since the build have no edges yet."""
    if len(indptr) - 1 >= n:
        return indptr
    out = np.concatenate([indptr, np.full(n + 1 - len(indptr), indptr[-1], dtype=np.int64)])
    _readonly(out)
    return out


class LinkGraph:
    """Directed link graph over a shared NodeIndex with slot-aligned per-edge arrays.

    >>> g = LinkGraph(NodeIndex())
    >>> g.add_edge("/", "/news", hour=0), g.add_edge("/news", "/sport", hour=0)
    (0, 1)
    >>> g.register("weight", np.float64, fill=1.0)
    >>> g.sum_into_dst(g.array("weight")[0]).tolist()
    [0.0, 1.0, 1.0]
    >>> g.hops("/", 2, "down")
    {'/': 0, '/news': 1, '/sport': 2}
    >>> g.remove_edge("/", "/news"), g.remove_edge("/", "/nowhere")
    (0, None)
    >>> g.in_degree().tolist(), g.neighbours("/sport", "up")
    ([0, 0, 1], ['/news'])
    """

    def __init__(self, nodes: NodeIndex, capacity: int = 16, tail_limit: int = 4096,
                 tail_fraction: float = 0.002, dead_limit: int = 4096, dead_fraction: float = 0.002) -> None:
        self.nodes = nodes
        self.tail_limit, self.tail_fraction = tail_limit, tail_fraction
        self.dead_limit, self.dead_fraction = dead_limit, dead_fraction
        cap = max(int(capacity), 1)
        self.src, self.dst = np.zeros(cap, dtype=np.int32), np.zeros(cap, dtype=np.int32)
        self.alive, self.born = np.zeros(cap, dtype=bool), np.zeros(cap, dtype=np.int32)  # born: hour index
        self.n_slots = self.main = self.n_dead = 0  # slots [0, main) are sorted by (dst, src)
        self.tail: dict[int, int] = {}  # key -> slot, alive tail edges only
        self.generation = 0  # bumped whenever slots are renumbered
        self.version = 0  # bumped on every change; caches compare against it
        self._arrays: dict[str, np.ndarray] = {}
        self._fills: dict[str, Any] = {}
        self._cache: dict[str, tuple[int, Any]] = {}  # name -> (version or generation, value)

    # -- construction ---------------------------------------------------------------------
    @classmethod
    def from_arrays(cls, nodes: NodeIndex | Sequence[str], src: np.ndarray, dst: np.ndarray,
                    hour: int | np.ndarray, **options: Any) -> LinkGraph:
        """Bulk-load edges given as index arrays into ``nodes`` (one sort, no Python loop).

        Duplicate ``(src, dst)`` pairs keep their first occurrence; self-loops raise.
        """
        if isinstance(nodes, NodeIndex):
            index = nodes
        else:
            index = NodeIndex()
            index.intern(nodes)
        src, dst, n = np.asarray(src, dtype=np.int64), np.asarray(dst, dtype=np.int64), len(index)
        ends = np.concatenate([src, dst])
        if src.shape != dst.shape or (ends.size and (ends.min() < 0 or ends.max() >= n)):
            raise ValueError(f"src and dst must be equal-length index arrays into the {n} nodes")
        loops = np.flatnonzero(src == dst)
        if loops.size:
            raise _self_loop(index.ids[src[loops[0]]])
        keys = _keys(src, dst)
        perm = np.argsort(keys, kind="stable")
        keys = keys[perm]
        first = np.concatenate([keys[:1] == keys[:1], keys[1:] != keys[:-1]])
        keys, perm, m = keys[first], perm[first], int(first.sum())
        g = cls(index, capacity=max(16, m + m // 8), **options)
        g.src[:m], g.dst[:m] = keys & 0xFFFFFFFF, keys >> _SHIFT
        g.born[:m] = np.broadcast_to(_hours32(hour), src.shape)[perm]
        g.alive[:m], g.n_slots, g.main = True, m, m
        return g

    def register(self, name: str, dtype: Any, fill: Any, rows: int = 1) -> None:
        """Add a per-edge array of shape ``(rows, capacity)``, kept aligned with the slots."""
        if name in self._arrays:
            raise ValueError(f"edge array {name!r} is already registered")
        self._arrays[name] = np.full((rows, len(self.src)), fill, dtype=dtype)
        self._fills[name] = fill

    def has_array(self, name: str) -> bool:
        return name in self._arrays

    def array(self, name: str) -> np.ndarray:
        """The registered ``(rows, capacity)`` array; column ``slot`` belongs to that edge.

        Fetch it again after growth (a new, larger array); compaction moves values in place.
        """
        try:
            return self._arrays[name]
        except KeyError:
            raise KeyError(f"no edge array {name!r}; registered: {sorted(self._arrays)}") from None

    # -- edge events ----------------------------------------------------------------------
    def _find(self, s: int, d: int) -> int | None:
        slot = self.tail.get((d << 32) | s)
        if slot is not None:
            return slot
        indptr = self._main_raw()[1]  # the main segment: d's in-links contiguous, sources ascending
        if d + 1 >= len(indptr):  # a node interned since: no main in-links
            return None
        lo, hi = int(indptr[d]), int(indptr[d + 1])
        i = lo + int(np.searchsorted(self.src[lo:hi], s))
        if i < hi and self.src[i] == s and self.alive[i]:
            return i
        return None

    def slot_of(self, src_id: str, dst_id: str) -> int | None:
        """Slot of the alive edge ``src_id -> dst_id``, or None."""
        if src_id not in self.nodes or dst_id not in self.nodes:
            return None
        return self._find(self.nodes.get(src_id), self.nodes.get(dst_id))

    def add_edge(self, src_id: str, dst_id: str, hour: int) -> int:
        """Add ``src_id -> dst_id`` (interning new nodes); return its slot. Existing: no-op."""
        if src_id == dst_id:
            raise _self_loop(src_id)
        self.maybe_compact()
        s, d = (int(i) for i in self.nodes.intern([src_id, dst_id]))
        slot = self._find(s, d)
        if slot is not None:
            return slot
        if self.n_slots == len(self.src):
            self._grow(max(16, len(self.src) + len(self.src) // 2))
        slot = self.n_slots
        self.src[slot], self.dst[slot], self.alive[slot], self.born[slot] = s, d, True, _hours32(hour)
        for name, arr in self._arrays.items():
            arr[:, slot] = self._fills[name]
        self.tail[(d << 32) | s] = slot
        self.n_slots += 1
        self.version += 1
        return slot

    def remove_edge(self, src_id: str, dst_id: str) -> int | None:
        """Remove ``src_id -> dst_id``; return the slot it had, or None if there was no such edge."""
        self.maybe_compact()
        slot = self.slot_of(src_id, dst_id)
        if slot is None:
            return None
        self.alive[slot] = False
        self.tail.pop((int(self.dst[slot]) << 32) | int(self.src[slot]), None)
        self.n_dead += 1
        self.version += 1
        return slot

    def _grow(self, cap: int) -> None:
        for attr in ("src", "dst", "alive", "born"):
            old = getattr(self, attr)
            new = np.zeros(cap, dtype=old.dtype)
            new[: len(old)] = old
            setattr(self, attr, new)
        for name, old in self._arrays.items():
            new = np.full((old.shape[0], cap), self._fills[name], dtype=old.dtype)
            new[:, : old.shape[1]] = old
            self._arrays[name] = new

    # -- compaction -----------------------------------------------------------------------
    def maybe_compact(self) -> bool:
        """Compact if the tail or the dead slots outgrew their thresholds; return whether it did."""
        due = (self.n_slots - self.main > max(self.tail_limit, self.tail_fraction * self.main)
               or self.n_dead > max(self.dead_limit, self.dead_fraction * self.n_slots))
        if due:
            self.compact()
        return due

    def _pending(self) -> tuple[np.ndarray, np.ndarray]:
        """Dead main slots (sorted) and alive tail slots sorted stably by dst; cached per version."""
        hit = self._cache.get("pending")
        if hit is not None and hit[0] == self.version:
            return hit[1]
        m = self.main
        drop = np.flatnonzero(~self.alive[:m]) if self.n_dead else np.zeros(0, np.int64)
        tail = np.flatnonzero(self.alive[m : self.n_slots]) + m
        tail = tail[np.argsort(self.dst[tail], kind="stable")]
        self._cache["pending"] = (self.version, (drop, tail))
        return drop, tail

    def compact(self) -> None:
        """Drop dead slots and splice the tail into the sorted main segment, renumbering slots.

        Every registered array is moved with the same splice (in place), so values follow
        their edge; ``generation`` is bumped so holders of slot numbers know they changed.
        """
        drop, tail = self._pending()
        tail_keys = _keys(self.src[tail], self.dst[tail])
        by_key = np.argsort(tail_keys)
        tail, tail_keys = tail[by_key], tail_keys[by_key]
        main_keys = _keys(self.src[: self.main], self.dst[: self.main])  # only while compacting
        plan = _splice_plan(self.main, drop, np.searchsorted(main_keys, tail_keys))
        del main_keys
        m, ns = self.main - drop.size + tail.size, self.n_slots
        for attr in ("src", "dst", "born"):
            old = getattr(self, attr)
            new = np.zeros_like(old)  # fresh buffers: CSR views handed out earlier stay valid
            _splice(plan, old[: self.main], old[tail], out=new[:m])
            setattr(self, attr, new)
        for name, arr in self._arrays.items():
            arr[:, :m] = _splice(plan, arr[:, : self.main], arr[:, tail])
            arr[:, m:ns] = self._fills[name]
        self.alive[:m], self.alive[m:ns] = True, False
        self.n_slots = self.main = m
        self.tail, self.n_dead = {}, 0
        self.generation += 1
        self.version += 1

    # -- per-hour views -------------------------------------------------------------------
    def _main_index(self) -> tuple[np.ndarray, np.ndarray]:
        """Identity order and indptr of the main segment (dead slots included), per generation."""
        order, indptr = self._main_raw()
        return order, _extend_indptr(indptr, len(self.nodes))

    def _main_raw(self) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`_main_index` with the indptr as built (nodes interned since are not in it)."""
        hit = self._cache.get("main")
        if hit is None or hit[0] != self.generation:
            n = len(self.nodes)
            order = np.arange(self.main, dtype=np.int32 if len(self.src) < 2**31 else np.int64)
            indptr = np.searchsorted(self.dst[: self.main], np.arange(n + 1, dtype=np.int32)).astype(np.int64)
            _readonly(order, indptr)
            hit = self._cache["main"] = (self.generation, (order, indptr))
        return hit[1]

    def csr(self) -> CSRView:
        """Destination-sorted CSR of the alive edges, cached until the next change."""
        hit = self._cache.get("csr")
        if hit is None or hit[0] != self.version:
            hit = self._cache["csr"] = (self.version, self._build_csr())
        view: CSRView = hit[1]
        if len(view.indptr) <= len(self.nodes):  # nodes interned since the build: no edges yet
            view = replace(view, indptr=_extend_indptr(view.indptr, len(self.nodes)))
            self._cache["csr"] = (self.version, view)
        return view

    def order_index(self) -> tuple[np.ndarray, np.ndarray]:
        """The destination-sorted CSR without its endpoint arrays, ``(order, indptr)``, cached
        until the next change: all a holder of per-edge state in CSR order needs to follow the
        slots (the endpoints are then read per slot); :meth:`csr` adds the endpoints."""
        order, indptr, _ = self._order_parts()
        return order, _extend_indptr(indptr, len(self.nodes))

    def _order_parts(self) -> tuple[np.ndarray, np.ndarray, Plan | None]:
        """``(order, indptr, plan)``: the splice plan from the main segment, None if no change."""
        hit = self._cache.get("order")
        if hit is None or hit[0] != self.version:
            hit = self._cache["order"] = (self.version, self._build_order())
        parts: tuple[np.ndarray, np.ndarray, Plan | None] = hit[1]
        return parts

    def _build_order(self) -> tuple[np.ndarray, np.ndarray, Plan | None]:
        m = self.main
        order, indptr = self._main_index()
        if not (self.n_slots > m or self.n_dead):
            return order, indptr, None
        drop, tail = self._pending()
        plan = _splice_plan(m, drop, np.searchsorted(self.dst[:m], self.dst[tail], side="right"))
        slot = np.int32 if len(self.src) < 2**31 else np.int64  # capacity may have grown past int32
        order = _splice(plan, order.astype(slot, copy=False), tail.astype(slot))
        nodes = np.arange(len(indptr), dtype=np.int32)
        indptr = indptr - np.searchsorted(self.dst[drop], nodes) + np.searchsorted(self.dst[tail], nodes)
        _readonly(order, indptr)
        return order, indptr, plan

    def _build_csr(self) -> CSRView:
        m = self.main
        order, indptr, plan = self._order_parts()
        src, dst = self.src[:m], self.dst[:m]
        if plan is not None:
            tail = self._pending()[1]
            src, dst = _splice(plan, src, self.src[tail]), _splice(plan, dst, self.dst[tail])
        _readonly(src, dst)
        return CSRView(order, indptr, src, dst)

    def sum_into_dst(self, values_per_slot: np.ndarray) -> np.ndarray:
        """Per node, the sum of ``values_per_slot`` over its alive in-edges (0 with none).

        ``np.add.reduceat`` over the dst-sorted main segment, only at the starts of non-empty
        runs (reduceat yields ``values[start]``, not 0, for an empty run), then the tail with
        ``np.add.at``. Dead slots are zeroed in a scratch copy, so NaN there cannot leak in.
        """
        m = self.main
        values = np.asarray(values_per_slot)
        drop, tail = self._pending()
        main = values[:m].astype(np.float64, copy=drop.size > 0)
        main[drop] = 0.0
        indptr = self._main_index()[1]
        out = np.zeros(len(indptr) - 1)
        nonempty = indptr[1:] > indptr[:-1]
        if m:
            out[nonempty] = np.add.reduceat(main, indptr[:-1][nonempty])
        np.add.at(out, self.dst[tail], values[tail])
        return out

    def gather_src(self, per_node: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Per slot, ``per_node`` at the edge's source (dead slots hold stale values)."""
        per_node = np.asarray(per_node)
        if per_node.shape[0] < len(self.nodes):
            raise ValueError(f"per-node array has {per_node.shape[0]} entries for {len(self.nodes)} nodes")
        return np.take(per_node, self.src[: self.n_slots], mode="clip", out=out)

    def in_degree(self) -> np.ndarray:
        """Alive in-edges per node (int64, length ``len(nodes)``)."""
        return np.diff(self.csr().indptr)

    def out_degree(self) -> np.ndarray:
        """Alive out-edges per node (int64, length ``len(nodes)``)."""
        return np.bincount(self.csr().src_sorted, minlength=len(self.nodes))

    @property
    def n_edges(self) -> int:
        """Number of alive edges."""
        return self.n_slots - self.n_dead

    # -- queries (on demand, not per hour) ------------------------------------------------
    def _out_csr(self) -> tuple[np.ndarray, np.ndarray]:
        """Source-sorted (indptr, dst) pair for downstream BFS, built on demand (one sort), cached."""
        hit = self._cache.get("out")
        if hit is None or hit[0] != self.version:
            c = self.csr()
            by_src = np.argsort(c.src_sorted)  # grouping is all BFS needs, so no stable sort
            nodes = np.arange(len(self.nodes) + 1, dtype=np.int32)
            indptr = np.searchsorted(c.src_sorted[by_src], nodes).astype(np.int64)
            hit = self._cache["out"] = (self.version, (indptr, c.dst_sorted[by_src]))
        indptr, dst = hit[1]
        return _extend_indptr(indptr, len(self.nodes)), dst

    def _adjacency(self, direction: str) -> tuple[np.ndarray, np.ndarray]:
        if direction == "up":
            c = self.csr()
            return c.indptr, c.src_sorted
        if direction == "down":
            return self._out_csr()
        raise ValueError(f"direction must be one of {_DIRECTIONS}, got {direction!r}")

    def _bfs(self, node: str, k: int, direction: str) -> tuple[np.ndarray, np.ndarray]:
        """Indices within ``k`` hops of ``node`` and their distances (frontier-vectorised BFS)."""
        if k < 0:
            raise ValueError(f"k must be >= 0, got {k}")
        indptr, nbr = self._adjacency(direction)
        start = self.nodes.get(node)
        dist = np.full(len(self.nodes), -1, dtype=np.int64)
        dist[start] = 0
        frontier, seen = np.array([start], dtype=np.int64), np.zeros(len(self.nodes), dtype=bool)
        for hop in range(1, k + 1):
            seen[_segments(indptr, nbr, frontier)] = True  # a mask, not np.unique: no sort
            frontier = np.flatnonzero(seen & (dist < 0))
            if frontier.size == 0:
                break
            dist[frontier] = hop
        found = np.flatnonzero(dist >= 0)
        return found, dist[found]

    def neighbours(self, node: str, direction: str) -> list[str]:
        """Ids one hop upstream (linking to ``node``) or downstream (linked from it), sorted."""
        found, dist = self._bfs(node, 1, direction)
        ids = self.nodes.ids
        return sorted(ids[i] for i in found[dist == 1])

    def hops(self, node: str, k: int, direction: str) -> dict[str, int]:
        """``{id: hop distance}`` for nodes within ``k`` hops, ``node`` itself at 0."""
        found, dist = self._bfs(node, k, direction)
        ids = self.nodes.ids
        return {ids[i]: d for i, d in zip(found.tolist(), dist.tolist(), strict=True)}

    def subgraph(self, node: str, k: int, direction: str, attrs: Iterable[str] = ()) -> Any:
        """Small networkx.DiGraph of the ``k``-hop neighbourhood with all alive edges among it.

        Nodes carry ``hops``; edges carry ``born`` and each named registered array (a scalar
        when it has one row, else a list).
        """
        import networkx as nx

        found, dist = self._bfs(node, k, direction)
        c = self.csr()
        slots = _segments(c.indptr, c.order, found)
        slots = slots[np.isin(self.src[slots], found)]
        ids = self.nodes.ids
        graph = nx.DiGraph()
        graph.add_nodes_from((ids[i], {"hops": d}) for i, d in zip(found.tolist(), dist.tolist(), strict=True))
        columns = {name: self.array(name)[:, slots] for name in attrs}
        for j, slot in enumerate(slots.tolist()):
            data: dict[str, Any] = {"born": int(self.born[slot])}
            for name, col in columns.items():
                data[name] = col[0, j].item() if col.shape[0] == 1 else col[:, j].tolist()
            graph.add_edge(ids[self.src[slot]], ids[self.dst[slot]], **data)
        return graph

    def edges(self) -> list[tuple[str, str]]:
        """All alive edges as ``(src_id, dst_id)`` in CSR order (for export and small graphs)."""
        c = self.csr()
        ids = self.nodes.ids
        return [(ids[s], ids[d]) for s, d in zip(c.src_sorted.tolist(), c.dst_sorted.tolist(), strict=True)]

    # -- checkpoints ----------------------------------------------------------------------
    def __getstate__(self) -> dict[str, Any]:
        """Plain arrays and dicts; cached views are dropped and rebuilt on demand."""
        state = self.__dict__.copy()
        state["_cache"] = {}
        return state
