"""The engine: one call per closed hour, arrays in, alert records out, no I/O.

Live service and replay drive this very object, so they cannot drift apart. Per hour, all
vectorised over nodes and edges:

1. seasonal baseline -> each node's own expected count ``b`` and residual scale;
2. flow model -> joint forecast ``F = b + sum_j beta_ij * ehat_j`` (neighbours' persisted
   excess through the learned link shares), before the hour is seen;
3. rules compare the observed count with ``F`` and its band;
4. the hour is learned (flows, then baseline); attribution made before learning names each
   alert's upstream neighbours; a missing count is filled from neighbours and baseline
   (marked imputed, never alerted on, not learned from);
5. alerts linked by attribution are grouped into incidents; nodes downstream of an open
   incident get a spill-over warning when their forecast crosses a configured capacity.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from zoneinfo import ZoneInfo

import numpy as np

from .attribution import Attribution
from .baseline import SeasonalBaseline
from .config import Config
from .flows import OLD_AFTER_TAUS
from .incidents import Active, IncidentTracker, IncidentUpdate
from .joint import JointModel
from .nodes import NodeIndex
from .records import Alert, SpillWarning, Upstream
from .rules import RuleBook
from .timeaxis import HOUR, format_hour, hour_index, local_slots

__all__ = ["Engine", "Foreign", "StepResult"]

_NEVER = np.iinfo(np.int64).min  # last_beyond of a node never beyond its band


@dataclass
class StepResult:
    """Everything the engine knew about one hour, as arrays over nodes plus records."""

    hour: datetime
    observed: np.ndarray  # counts, NaN where missing
    expected: np.ndarray  # joint forecast F (own baseline when flows are off)
    band_low: np.ndarray
    band_high: np.ndarray
    score: np.ndarray  # signed residual in scales, NaN where missing
    warm: np.ndarray
    adopted: np.ndarray
    own_expected: np.ndarray  # seasonal baseline b
    imputed: np.ndarray  # filled value where the count is missing (NaN elsewhere)
    attribution: Attribution | None = None  # per-edge contributions, made before learning
    alerts: list[Alert] = field(default_factory=list)
    incidents: list[IncidentUpdate] = field(default_factory=list)
    spills: list[SpillWarning] = field(default_factory=list)
    suppressed: dict[str, int] = field(default_factory=dict)  # rule met, held back by cooldown


@dataclass(frozen=True)
class Foreign:
    """Nodes owned by other partitions (ghosts), with their owners' figures for the hour.

    A partitioned worker holds the links into its own nodes; their sources may live in
    another partition. For those ghost nodes the owner's observed count (in ``x``) and own
    seasonal expectation (``own``) are used as given, so the flow model sees exactly what a
    single worker would; a ghost never alerts and joins no incident.
    """

    mask: np.ndarray  # (n,) bool: ghost nodes
    own: np.ndarray  # (n,) the owners' seasonal expectation (used where mask)


class Engine:
    """Seasonal baseline, neighbour flows and alert rules over an open-ended graph.

    >>> from datetime import timedelta
    >>> from alerter.config import Config
    >>> from alerter.timeaxis import parse_hour
    >>> eng = Engine(Config())
    >>> t0 = parse_hour("2026-11-02T07:00:00Z")
    >>> eng.add_edge("/", "/quiet", t0)
    >>> for h in range(24 * 7):
    ...     res = eng.step(t0 + timedelta(hours=h), {"/": 1000.0, "/quiet": 50.0})
    >>> res = eng.step(t0 + timedelta(hours=24 * 7), {"/": 9000.0, "/quiet": 50.0})
    >>> [(a.node, a.kind, a.origin) for a in res.alerts]
    [('/', 'surge', 'originating')]
    """

    def __init__(self, config: Config) -> None:
        self.config = config
        self.tz = ZoneInfo(config.clock.timezone)
        self.nodes = NodeIndex()
        self.baseline = SeasonalBaseline(config.baseline)
        self.rules = RuleBook(config.rules)
        self.joint = JointModel(self.nodes, config.flows, config.attribution, config.baseline.dtype)
        inc = config.incidents
        self.incidents = IncidentTracker(inc.link_min_share, inc.adjacent_hours, inc.quiet_hours)
        self.prev_excess = np.zeros(0)
        self.last_beyond = {d: np.zeros(0, np.int64) for d in ("surge", "drop")}
        self.last_hour: datetime | None = None

    @property
    def graph(self):  # noqa: ANN201 - the LinkGraph, for queries
        return self.joint.graph

    # -- graph events --------------------------------------------------------------------
    def _tick_for(self, ts: datetime | None) -> int:
        if ts is not None:
            return hour_index(ts)
        return hour_index(self.last_hour) + 1 if self.last_hour is not None else 0

    def add_edge(self, src: str, dst: str, ts: datetime | None = None) -> None:
        """A link appears; it takes effect from the next closed hour.

        A link to a node whose baseline has not started yet is as old as that baseline: the
        baseline will learn with the link's inflow in it from the first hour, so nothing is
        left to absorb. Only a link to a node already being learned counts as new.
        """
        tick = self._tick_for(ts)
        learning = dst in self.nodes and self.nodes.get(dst) < self.baseline.state.n \
            and self.baseline.state.seen[self.nodes.get(dst)] > 0
        born = tick if learning else tick - int(np.ceil(OLD_AFTER_TAUS * self.config.flows.age_tau_hours))
        self.joint.add_edge(src, dst, born)
        self._grow()

    def remove_edge(self, src: str, dst: str, ts: datetime | None = None) -> bool:
        """A link disappears; False when there was no such link."""
        return self.joint.remove_edge(src, dst, self._tick_for(ts))

    # -- hours ---------------------------------------------------------------------------
    def _grow(self) -> None:
        n = len(self.nodes)
        if n > self.rules.n:
            self.rules.add_nodes(self.nodes.ids[self.rules.n:])
            self.baseline.resize(n)
            grown = np.zeros(n)
            grown[: self.prev_excess.shape[0]] = self.prev_excess
            self.prev_excess = grown
            for d, old in self.last_beyond.items():
                ticks = np.full(n, _NEVER, np.int64)
                ticks[: old.shape[0]] = old
                self.last_beyond[d] = ticks

    def ensure_nodes(self) -> None:
        """Size the per-node state to every id interned in ``self.nodes`` so far.

        Adapters that intern ids in bulk (the Redis buckets) call this before
        ``step_array``; ``step`` and ``add_edge`` do it themselves.
        """
        self._grow()

    def counts_array(self, counts: Mapping[str, float | None]) -> np.ndarray:
        """Dense counts over all nodes (NaN where missing), interning new ids."""
        idx = self.nodes.intern(list(counts))
        self._grow()
        x = np.full(len(self.nodes), np.nan)
        x[idx] = np.array([np.nan if v is None else v for v in counts.values()], dtype=float)
        return x

    def step(self, hour: datetime, counts: Mapping[str, float | None]) -> StepResult:
        """Close one hour given ``{node: count}``; absent nodes are missing."""
        return self.step_array(hour, self.counts_array(counts))

    def step_array(self, hour: datetime, x: np.ndarray, *, foreign: Foreign | None = None,
                   track: bool = True) -> StepResult:
        """Close one hour given dense counts indexed like ``self.nodes`` (NaN missing).

        ``foreign`` marks ghost nodes of other partitions (see :class:`Foreign`);
        ``track=False`` leaves incidents and spill-over warnings to the caller (a
        partitioned run groups all partitions' alerts in one place with :meth:`track`).
        """
        if self.last_hour is not None and hour <= self.last_hour:
            raise ValueError(f"hour {format_hour(hour)} is not after {format_hour(self.last_hour)}")
        slot, day = local_slots(hour, self.tz)
        tick = hour_index(hour)
        b_model = self.baseline
        y = b_model.to_working(x)
        y_own = b_model.forecast(slot, day)
        sd32 = b_model.scale(yhat=y_own)
        sd = sd32.astype(float)
        own = np.maximum(b_model.from_working(y_own.astype(float)), 0.0)
        if foreign is not None:
            own = np.where(foreign.mask, foreign.own, own)
        flows_on = self.config.flows.enabled
        joint = own + self.joint.forecast(self.prev_excess, tick) if flows_on else own.copy()
        np.maximum(joint, 0.0, out=joint)
        # An alert must stand out from both the node's own rhythm and the joint forecast: a
        # surge above the larger, a drop below the smaller (the end of an upstream surge is
        # no drop, nor is an upstream outage's echo, which its incident already covers).
        exp_up, exp_dn = np.maximum(joint, own), np.minimum(joint, own)
        y_up, y_dn = b_model.to_working(exp_up).astype(float), b_model.to_working(exp_dn).astype(float)
        observed = ~np.isnan(x)
        warm = b_model.warm() & observed
        if foreign is not None:
            warm &= ~foreign.mask
        with np.errstate(invalid="ignore"):
            score, score_dn = (y - y_up) / sd, (y - y_dn) / sd
        low = np.maximum(b_model.from_working(y_dn - self.rules.z("drop") * sd), 0.0)
        high = b_model.from_working(y_up + self.rules.z("surge") * sd)
        up, down = self.rules.evaluate(x, exp_up, score, warm, tick, exp_dn, score_dn)
        attribution = self.joint.observe(x, own, tick) if flows_on else None
        imputed = self._impute(x, own, attribution)
        adopted = b_model.update(y, slot, day, forecast=y_own, scale=sd32)
        self.prev_excess = np.where(observed, x - own, 0.0)
        result = StepResult(hour, x, joint, low, high, score, warm, adopted, own, imputed, attribution)
        result.alerts = self._alerts(result, up, down, (exp_up, exp_dn), (score, score_dn))
        result.suppressed = {d: int(self.rules.suppressed[d].sum()) for d in ("surge", "drop")}
        for d, ticks in self.last_beyond.items():
            ticks[self.rules.active[d]] = tick
        if track:
            result.incidents, result.spills = self.track(hour, result.alerts, _Beyond(self))
        self.last_hour = hour
        return result

    def track(self, hour: datetime, alerts: list[Alert],
              active: Active) -> tuple[list[IncidentUpdate], list[SpillWarning]]:
        """Group one hour's alerts into incidents; spill-over warnings of the open ones.

        ``step_array`` calls this itself unless ``track=False``; ``active`` says who is
        beyond the band (see :meth:`IncidentTracker.step`).
        """
        tick = hour_index(hour)
        updates = self.incidents.step(tick, format_hour(hour), alerts, active)
        spills: list[SpillWarning] = []
        if self.config.flows.enabled and self.config.incidents.capacity and self.incidents.open:
            spills = self._spills(hour, tick)
        return updates, spills

    def _impute(self, x: np.ndarray, own: np.ndarray, attribution: Attribution | None) -> np.ndarray:
        """Fill missing counts of known nodes: own baseline plus neighbours' inflow."""
        out = np.full(x.shape, np.nan)
        gap = np.isnan(x) & (self.baseline.state.seen > 0)
        if gap.any():
            fill = own if attribution is None else own + self.joint.inflow(attribution)
            out[gap] = np.maximum(fill[gap], 0.0)
        return out

    def explain_upstream(self, r: StepResult, i: int) -> tuple[tuple[Upstream, ...], float | None, str | None]:
        """Top upstream neighbours, unexplained part and origin of node ``i`` in hour ``r``."""
        return self._explain(r, i, float(r.observed[i]), hour_index(r.hour))

    def _explain(self, r: StepResult, i: int, observed: float,
                 tick: int) -> tuple[tuple[Upstream, ...], float | None, str | None]:
        if r.attribution is None or observed != observed:  # no flows, or a missing count (NaN)
            return (), None, None
        own_excess = observed - float(r.own_expected[i])
        upstream, unexplained = self.joint.upstream(i, r.attribution, r.own_expected, own_excess, tick)
        return upstream, unexplained, self.joint.origin(unexplained, own_excess)

    def _alerts(self, r: StepResult, up: np.ndarray, down: np.ndarray,
                expected: tuple[np.ndarray, np.ndarray], scores: tuple[np.ndarray, np.ndarray]) -> list[Alert]:
        """One record per firing node; the per-node figures are read as lists once per hour
        (a storm hour can hold thousands of alerts)."""
        hour, tick = format_hour(r.hour), hour_index(r.hour)
        out = []
        for kind, mask, exp, score in (("surge", up, expected[0], scores[0]),
                                       ("drop", down, expected[1], scores[1])):
            idx = np.flatnonzero(mask)
            rows = zip(idx.tolist(), r.observed[idx].tolist(), exp[idx].tolist(), r.band_low[idx].tolist(),
                       r.band_high[idx].tolist(), score[idx].tolist(), self.rules.rule_names_of(kind, idx),
                       self.rules.streaks_of(kind, idx), strict=True)
            for i, observed, expect, low, high, sc, rule, streak in rows:
                upstream, unexplained, origin = self._explain(r, i, observed, tick)
                out.append(Alert.build(
                    node=self.nodes.ids[i], hour=hour, kind=kind, observed=observed, expected=expect,
                    band_low=low, band_high=high, score=sc, rule=rule, streak=streak, upstream=upstream,
                    unexplained=unexplained, origin=origin,
                ))
        out.sort(key=lambda a: (a.kind, a.node))
        return out

    def _spills(self, hour: datetime, tick: int) -> list[SpillWarning]:
        """Downstream nodes of open surge incidents whose next-hour forecast crosses capacity."""
        nxt = hour + HOUR
        load = self.next_load(hour)
        rules = self.config.incidents.capacity
        out = []
        for inc in self.incidents.open.values():
            if inc.direction != "surge":
                continue
            for member in sorted(inc.members):
                for node in self.graph.neighbours(member, "down"):
                    cap = next((r.visits_per_hour for r in rules if r.matches(node)), None)
                    value = float(load[self.nodes.get(node)])
                    if cap is not None and value > cap and node not in inc.members:
                        out.append(SpillWarning(node, format_hour(nxt), round(value, 1), cap, inc.id, member))
        unique = {(w.node, w.incident): w for w in out}
        return sorted(unique.values(), key=lambda w: (w.incident, w.node))

    # -- partitioned mode ----------------------------------------------------------------
    # What a worker of a partitioned run needs around ``step_array`` to publish its nodes'
    # figures before the hour and to adopt its ghosts' figures from their owners. Each is
    # the very expression ``step_array`` / ``_spills`` uses, so the owner and the one-worker
    # engine compute the same numbers.
    def own_expected(self, hour: datetime) -> np.ndarray:
        """Each node's own seasonal expectation ``b`` for ``hour``, as ``step_array`` will use it
        (the baseline's forecast before the hour's counts are learned); no state changes."""
        slot, day = local_slots(hour, self.tz)
        y_own = self.baseline.forecast(slot, day)
        return np.maximum(self.baseline.from_working(y_own.astype(float)), 0.0)

    def adopt_excess(self, mask: np.ndarray, excess: np.ndarray) -> None:
        """Set the persisted excess of the ``mask`` nodes (ghosts) to their owners' values.

        A ghost interned this hour has no past here; its owner's ``x - b`` of the previous
        hour is what the one-worker engine would feed into the joint forecast.
        """
        self._grow()
        self.prev_excess[mask] = excess[mask]

    def next_load(self, hour: datetime) -> np.ndarray:
        """Per node the forecast load of the hour after ``hour`` (call after stepping ``hour``):
        the spill-over check's ``b_next + neighbour part``, for nodes whose links live here."""
        return self.own_expected(hour + HOUR) + self.joint.forecast(self.prev_excess, hour_index(hour) + 1)


class _Beyond:
    """The incident tracker's view of ``Engine.last_beyond``: the last tick a node was beyond
    its band (by id), and every (node, direction) beyond at a tick (one array scan)."""

    def __init__(self, engine: Engine) -> None:
        self.nodes, self.last = engine.nodes, engine.last_beyond

    def __call__(self, node: str, direction: str) -> int | None:
        i = self.nodes.get(node) if node in self.nodes else -1
        ticks = self.last[direction]
        t = int(ticks[i]) if 0 <= i < ticks.shape[0] else _NEVER
        return None if t == _NEVER else t

    def beyond_at(self, tick: int) -> list[tuple[str, str]]:
        ids = self.nodes.ids
        return [(ids[i], d) for d, ticks in self.last.items() for i in np.flatnonzero(ticks == tick).tolist()]
