"""The graph half of the engine: live links, learned flows, joint forecast and attribution.

Holds the live :class:`~alerter.graph.LinkGraph` and the :class:`~alerter.flows.FlowLearner`
whose edge list mirrors the graph's destination-sorted CSR (so the in-edges of node ``i``
are learner positions ``indptr[i]:indptr[i+1]``). Per closed hour it gives

- the neighbour part of the joint forecast ``F_i = b_i + sum_j beta_ij * ehat_j`` (before
  the hour is seen, from each source's persisted excess);
- after the hour is seen, per-edge contributions to each node's excess over its own
  baseline, capped so they never explain more than that excess, which name the upstream
  neighbours of an alert and fill a node whose count is missing.

A removed link is remembered for ``removed_memory_hours``: the normal inflow it used to
bring (its coefficient times the source's baseline, weighted by how far the target's
baseline had absorbed it) is offered as a cause of a drop at its former target.

Everything here is an estimate from past co-movement of counts; it does not prove cause.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import edge_room, flow_kernels
from .attribution import Attribution
from .config import AttributionSettings, FlowConfig
from .flows import FlowLearner, FlowSettings, LinkAges, match_edges, persistence_forecast
from .graph import LinkGraph
from .nodes import NodeIndex
from .records import Upstream

__all__ = ["JointModel", "Removed", "flow_settings"]

_POSITION = "learner_position"  # per-edge graph array: the slot's position in the learner


def flow_settings(cfg: FlowConfig, dtype: str) -> FlowSettings:
    """The learner's settings from the YAML subset (the rest keep their defaults)."""
    return FlowSettings(lags=cfg.lags, own_lag=cfg.own_lag, forgetting=cfg.forgetting, step=cfg.step,
                        beta_max=cfg.beta_max, cap=cfg.cap, prior=cfg.prior,
                        age_tau_hours=cfg.age_tau_hours, dtype=dtype)


@dataclass(frozen=True)
class Removed:
    """A link removed recently, kept to explain a drop at its former target."""

    src: int
    dst: int
    beta: float
    absorbed: float  # a_e at removal: the part of its inflow the target's baseline held
    tick: int


class JointModel:
    """Live graph plus flow learner; all per-hour work is array operations over edges."""

    def __init__(self, nodes: NodeIndex, flows: FlowConfig, attribution: AttributionSettings,
                 dtype: str = "float32") -> None:
        self.nodes = nodes
        self.cfg = flows
        self.attr = attribution
        self.graph = LinkGraph(nodes)
        self.learner = FlowLearner(flow_settings(flows, dtype))
        self.removed: list[Removed] = []
        self._synced = -1
        self.indptr = np.zeros(1, np.int64)
        self.born = np.zeros(0, np.int64)

    # -- structure ---------------------------------------------------------------------
    def add_edge(self, src: str, dst: str, tick: int) -> None:
        self.graph.add_edge(src, dst, hour=tick)

    def remove_edge(self, src: str, dst: str, tick: int) -> bool:
        """Remove a link, remembering the normal inflow it carried; False if unknown."""
        if src not in self.nodes or dst not in self.nodes:
            return False
        s, d = self.nodes.get(src), self.nodes.get(dst)
        pos = self._position(s, d)
        if self.graph.remove_edge(src, dst) is None:
            return False
        if pos is not None:
            beta = float(self.learner.coefficients[0, pos])
            age = float(tick - self.born[pos])
            absorbed = 1.0 - float(np.exp(-max(age, 0.0) / self.cfg.age_tau_hours))
            self.removed.append(Removed(s, d, beta, absorbed, tick))
        return True

    def _position(self, s: int, d: int) -> int | None:
        """Learner position of edge s -> d as of the last sync (scan of d's in-edges only)."""
        if d + 1 >= len(self.indptr):
            return None
        lo, hi = int(self.indptr[d]), int(self.indptr[d + 1])
        hit = np.flatnonzero(self.learner.state.src[lo:hi] == s)
        return lo + int(hit[0]) if hit.size else None

    def sync(self) -> None:
        """Mirror the graph's CSR in the learner when links or nodes changed.

        Kept edges keep their coefficients; new ones start at the prior, and so does a link
        removed and added again since the last sync (it has a new graph slot). Costs a few
        passes over the edges, only in hours whose structure changed.
        """
        n = len(self.nodes)
        key = (self.graph.version, n)
        if key == self._synced:
            return
        g = self.graph
        fresh = not g.has_array(_POSITION)
        if fresh:
            g.register(_POSITION, np.int32, fill=-1)
        if flow_kernels.AVAILABLE and not fresh and g.src.dtype == np.int32:  # int32: the learner's type
            order, indptr = g.order_index()
            keep, self.born, src, dst = self._followed(order)
        else:
            csr = g.csr()
            order, indptr, src, dst = csr.order, csr.indptr, csr.src_sorted, csr.dst_sorted
            keep, self.born = self._kept(order)
            old = self.learner.state
            if fresh and old.src.size:  # never followed by slot (bulk load, older checkpoint): match by pair
                keep = match_edges(old.src, old.dst, src, dst, max(n, 1))
        self.indptr = np.asarray(indptr, np.int64)
        self.learner.resize(n, src, dst, keep, self.indptr)
        self._synced = key  # type: ignore[assignment]

    def _buffer(self, current: np.ndarray, m: int, dtype: type) -> np.ndarray:
        """Room for ``m`` per-edge values: ``current``'s buffer when it has room (no new pages to
        fault in; its old values are not read again), else a new one with room."""
        buf = edge_room.room(current, 0, m) if current.dtype == dtype else None
        return buf[:m] if buf is not None else edge_room.allocate((m,), dtype, axis=0)

    def _born_buffer(self, m: int) -> np.ndarray:
        """:meth:`_buffer` for the birth hours (the graph's dtype: int32, int64 in graphs of
        older checkpoints); an old buffer without room is let go first (peak memory)."""
        dtype = self.graph.born.dtype.type
        if self.born.dtype != dtype or edge_room.room(self.born, 0, m) is None:
            self.born = self.born[:0]
        return self._buffer(self.born, m, dtype)

    def _followed(self, order: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`_kept` plus the links' endpoints in the new order, read per slot in the same
        parallel pass into the learner's own endpoint buffers (the graph's CSR endpoint arrays
        are not built). Returned read-only, so the learner shares them."""
        g, st, m = self.graph, self.learner.state, order.shape[0]
        born = self._born_buffer(m)
        src, dst = self._buffer(st.src, m, np.int32), self._buffer(st.dst, m, np.int32)
        keep = np.empty(m, np.int32)
        flow_kernels.follow_slots(order, g.array(_POSITION)[0], g.born, keep, born, g.src, g.dst, src, dst)
        src.flags.writeable = dst.flags.writeable = False
        return keep, born, src, dst

    def _kept(self, order: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``keep[new position] = learner position of the same link at the last sync, or -1``,
        and the links' birth hours in the new order (the graph's dtype: int32).

        The graph keeps each slot's learner position in a registered per-edge array (it
        follows the slots through compaction; new slots start at -1), so matching is one
        gather and one scatter, O(edges), instead of a sort of every (src, dst) pair. A
        graph that never held the array (loaded in bulk, or from an older checkpoint) is
        matched once by pair (in :meth:`sync`).
        """
        g = self.graph
        pos = g.array(_POSITION)[0]
        born = self._born_buffer(order.shape[0])
        keep = np.empty(order.shape[0], np.int32)
        if flow_kernels.AVAILABLE:  # one parallel pass
            none = np.zeros(0, np.int32)
            flow_kernels.follow_slots(order, pos, g.born, keep, born, none, none, none, none)
        else:
            keep[:] = pos[order]
            pos[order] = np.arange(order.shape[0], dtype=np.int32)
            born[:] = g.born[order]
        return keep, born

    # -- per hour ----------------------------------------------------------------------
    def forecast(self, prev_excess: np.ndarray, tick: int) -> np.ndarray:
        """Neighbour part of this hour's joint forecast (counts), before the hour is seen.

        ``sum_j beta_ij * ehat_j`` with ``ehat_j`` the source's persisted excess. A new link's
        not-yet-absorbed normal inflow is left out on purpose: the traffic a new link brings
        is news the on-call engineer should get as an alert, explained by attribution.
        """
        self.sync()
        ehat = persistence_forecast(prev_excess, self.cfg.excess_decay)
        # b_next = 0 (see above): None lets the learner skip the baseline term and link ages
        return self.learner.forecast(ehat, None, None)

    def observe(self, x: np.ndarray, b: np.ndarray, tick: int) -> Attribution:
        """Learn the seen hour; return the attribution made before learning from it."""
        self.sync()
        step = self.learner.observe(x, b, LinkAges(self.born, tick))
        self.removed = [r for r in self.removed if tick - r.tick <= self.attr.removed_memory_hours]
        return step.attribution

    def inflow(self, attribution: Attribution) -> np.ndarray:
        """Per node, the signed sum of its neighbours' contributions (for imputation)."""
        return attribution.inflow

    # -- explaining one node -----------------------------------------------------------
    def upstream(self, i: int, attribution: Attribution, b: np.ndarray, own_excess: float,
                 tick: int) -> tuple[tuple[Upstream, ...], float]:
        """Top upstream neighbours of node ``i`` and the unexplained part of its excess.

        Shares are of the excess over the node's own seasonal baseline; they sum to <= 1.
        """
        lo, hi = (int(self.indptr[i]), int(self.indptr[i + 1])) if i + 1 < len(self.indptr) else (0, 0)
        if lo == hi and own_excess >= 0:  # no in-link: none of it is explained (drops may have removed links)
            return (), own_excess
        src = self.learner.state.src[lo:hi]
        visits = attribution.capped_run(i, lo, hi).astype(float)
        if own_excess < 0:
            src, visits = self._with_removed(i, src, visits, b)
        target = abs(own_excess)
        total = float(visits.sum())
        if total > target > 0:
            visits = visits * (target / total)
        picked = []
        for k in _top(visits, src, self.attr.top).tolist():
            share = visits[k] / target if target > 0 else 0.0
            if share < self.attr.min_share:
                break
            picked.append(Upstream(self.nodes.ids[int(src[k])], round(float(visits[k]), 1),
                                   round(float(share), 3), self._link_label(lo + k, hi, tick)))
        unexplained = max(target - float(visits.sum()), 0.0)
        return tuple(picked), unexplained * (1.0 if own_excess >= 0 else -1.0)

    def _link_label(self, pos: int, hi: int, tick: int) -> str | None:
        """"removed" past the node's in-edges (a remembered link), "new" for a young link."""
        if pos >= hi:
            return "removed"
        return "new" if tick - int(self.born[pos]) < self.attr.new_link_hours else None

    def _with_removed(self, i: int, src: np.ndarray, visits: np.ndarray,
                      b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        ghosts = [r for r in self.removed if r.dst == i]
        if not ghosts:
            return src, visits
        lost = np.array([r.beta * max(r.absorbed, 1e-3) * max(float(b[r.src]), 0.0) for r in ghosts])
        return np.concatenate([src, np.array([r.src for r in ghosts])]), np.concatenate([visits, lost])

    def origin(self, unexplained: float, own_excess: float) -> str:
        """originating / propagated / mixed, from the unexplained share of the excess."""
        if own_excess == 0:
            return "originating"
        part = abs(unexplained) / abs(own_excess)
        if part >= self.attr.originating_above:
            return "originating"
        if part <= self.attr.propagated_below:
            return "propagated"
        return "mixed"

    def coefficient_table(self, i: int, direction: str, tick: int) -> list[tuple[str, float, int]]:
        """(neighbour, lag-0 coefficient, link age in hours) of node ``i``'s in- or out-links."""
        st = self.learner.state
        if direction == "up":
            lo, hi = int(self.indptr[i]), int(self.indptr[i + 1])
            pos = np.arange(lo, hi)
            other = st.src[pos]
        else:
            pos = np.flatnonzero(st.src == i)
            other = st.dst[pos]
        beta = self.learner.coefficients[0, pos]
        rows = [(self.nodes.ids[int(o)], round(float(bv), 4), int(a)) for o, bv, a in
                zip(other.tolist(), beta.tolist(), (tick - self.born[pos]).tolist(), strict=True)]
        return sorted(rows, key=lambda r: (-r[1], r[0]))


    def neighbourhood(self, node: str, k: int, direction: str,
                      tick: int) -> list[tuple[int, str, str, float, int]]:
        """Nodes within ``k`` links up- or downstream: (hops, node, via, learned share, link age).

        ``via`` is the neighbour one hop closer to ``node``; the share is that link's
        lag-0 coefficient (of the upstream end's visitors reaching the downstream end).
        """
        self.sync()
        hops = self.graph.hops(node, k, direction)
        rows = []
        for other, h in sorted(hops.items(), key=lambda kv: (kv[1], kv[0])):
            if h == 0:
                continue
            # the link between `other` and a node one hop closer, seen from its downstream end
            down = other if direction == "down" else None
            links = self.coefficient_table(self.nodes.get(other), "up", tick) if down else \
                self.coefficient_table(self.nodes.get(other), "down", tick)
            closer = [r for r in links if hops.get(r[0]) == h - 1]
            via, share, age = closer[0] if closer else ("?", float("nan"), -1)
            rows.append((h, other, via, share, age))
        rows.sort(key=lambda r: (r[0], -r[3] if r[3] == r[3] else 0.0, r[1]))
        return rows


def _top(visits: np.ndarray, src: np.ndarray, k: int) -> np.ndarray:
    """Positions of the ``k`` largest ``visits``, largest first, ties by ``src``: what a full
    ``np.lexsort((src, -visits))[:k]`` gives, sorting only the entries that can be in it
    (a hub has tens of thousands of in-links and an alert names a handful)."""
    if visits.size > 4 * k > 0 and not np.isnan(visits).any():  # NaN would sort last in lexsort, not in partition
        kth = np.partition(visits, visits.size - k)[visits.size - k]
        cand = np.flatnonzero(visits >= kth)
        return cand[np.lexsort((src[cand], -visits[cand]))][:k]
    return np.lexsort((src, -visits))[:k]
