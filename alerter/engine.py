"""The engine: one call per closed hour, arrays in, alert records out, no I/O.

Live service and replay drive this very object, so they cannot drift apart. The per-hour
work is vectorised over all nodes: forecast, score, rule evaluation, then learning.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from zoneinfo import ZoneInfo

import numpy as np

from .baseline import SeasonalBaseline
from .config import Config
from .nodes import NodeIndex
from .records import Alert
from .rules import RuleBook
from .timeaxis import format_hour, hour_index, local_slots

__all__ = ["Engine", "StepResult"]


@dataclass
class StepResult:
    """Everything the engine knew about one hour, as arrays over nodes plus alerts."""

    hour: datetime
    observed: np.ndarray  # counts, NaN where missing
    expected: np.ndarray
    band_low: np.ndarray
    band_high: np.ndarray
    score: np.ndarray  # signed residual in scales, NaN where missing
    warm: np.ndarray
    adopted: np.ndarray
    alerts: list[Alert] = field(default_factory=list)


class Engine:
    """Seasonal baseline plus alert rules over an open-ended set of nodes.

    >>> from datetime import timedelta
    >>> from alerter.config import Config
    >>> from alerter.timeaxis import parse_hour
    >>> eng = Engine(Config())
    >>> t0 = parse_hour("2026-11-02T07:00:00Z")
    >>> for h in range(24 * 7):
    ...     res = eng.step(t0 + timedelta(hours=h), {"/": 1000.0, "/quiet": 50.0})
    >>> res = eng.step(t0 + timedelta(hours=24 * 7), {"/": 9000.0, "/quiet": 50.0})
    >>> [(a.node, a.kind) for a in res.alerts]
    [('/', 'surge')]
    """

    def __init__(self, config: Config) -> None:
        self.config = config
        self.tz = ZoneInfo(config.clock.timezone)
        self.nodes = NodeIndex()
        self.baseline = SeasonalBaseline(config.baseline)
        self.rules = RuleBook(config.rules)
        self.edges: set[tuple[str, str]] = set()
        self.last_hour: datetime | None = None

    # -- graph events (kept for the flow model; the own-only engine does not use them) --
    def add_edge(self, src: str, dst: str) -> None:
        self._grow(self.nodes.intern([src, dst]))
        self.edges.add((src, dst))

    def remove_edge(self, src: str, dst: str) -> None:
        self.edges.discard((src, dst))

    # -- hours -------------------------------------------------------------------------
    def _grow(self, idx: np.ndarray) -> None:
        n = len(self.nodes)
        if n > self.rules.n:
            self.rules.add_nodes(self.nodes.ids[self.rules.n:])
            self.baseline.resize(n)

    def counts_array(self, counts: Mapping[str, float | None]) -> np.ndarray:
        """Dense counts over all nodes (NaN where missing), interning new ids."""
        ids = list(counts)
        idx = self.nodes.intern(ids)
        self._grow(idx)
        x = np.full(len(self.nodes), np.nan)
        values = np.array([np.nan if v is None else v for v in counts.values()], dtype=float)
        x[idx] = values
        return x

    def step(self, hour: datetime, counts: Mapping[str, float | None]) -> StepResult:
        """Close one hour given ``{node: count}``; absent nodes are missing."""
        return self.step_array(hour, self.counts_array(counts))

    def step_array(self, hour: datetime, x: np.ndarray) -> StepResult:
        """Close one hour given dense counts indexed like ``self.nodes`` (NaN missing)."""
        if self.last_hour is not None and hour <= self.last_hour:
            raise ValueError(f"hour {format_hour(hour)} is not after {format_hour(self.last_hour)}")
        slot, day = local_slots(hour, self.tz)
        b = self.baseline
        y = b.to_working(x)
        yhat = b.forecast(slot, day).astype(float)
        sd = b.scale().astype(float)
        observed = ~np.isnan(x)
        warm = b.warm() & observed
        with np.errstate(invalid="ignore"):
            score = (y - yhat) / sd
        expected = np.maximum(b.from_working(yhat), 0.0)
        low = np.maximum(b.from_working(yhat - self.rules.z("drop") * sd), 0.0)
        high = b.from_working(yhat + self.rules.z("surge") * sd)
        tick = hour_index(hour)
        up, down = self.rules.evaluate(x, expected, score, warm, tick)
        adopted = b.update(y, slot, day)
        result = StepResult(hour, x, expected, low, high, score, warm, adopted)
        result.alerts = self._alerts(result, up, down)
        self.last_hour = hour
        return result

    def _alerts(self, r: StepResult, up: np.ndarray, down: np.ndarray) -> list[Alert]:
        hour = format_hour(r.hour)
        out = []
        for kind, mask in (("surge", up), ("drop", down)):
            for i in np.flatnonzero(mask).tolist():
                out.append(Alert.build(
                    node=self.nodes.ids[i], hour=hour, kind=kind, observed=r.observed[i],
                    expected=r.expected[i], band_low=r.band_low[i], band_high=r.band_high[i],
                    score=r.score[i], rule=self.rules.rule_name(kind, i),
                    streak=self.rules.streak(kind, i),
                ))
        out.sort(key=lambda a: (a.kind, a.node))
        return out
