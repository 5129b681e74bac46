"""Replay: drive the engine from a recording, hour by hour, exactly as the live path does."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np

from .config import Config
from .engine import Engine, StepResult
from .errors import RecordingError
from .incidents import IncidentUpdate
from .recording import CountsEvent, EdgeEvent, Header, read_recording
from .records import Alert, NodeHour, SpillWarning
from .timeaxis import format_hour

__all__ = ["ReplayResult", "replay", "node_hour"]


@dataclass
class ReplayResult:
    """Alerts of a whole recording, plus what was watched along the way."""

    alerts: list[Alert] = field(default_factory=list)
    incidents: list[IncidentUpdate] = field(default_factory=list)
    spills: list[SpillWarning] = field(default_factory=list)
    hours: list[datetime] = field(default_factory=list)
    header: Header | None = None
    bad_lines: list[RecordingError] = field(default_factory=list)
    trace: dict[str, list[NodeHour]] = field(default_factory=dict)
    engine: Engine | None = None

    @property
    def span(self) -> tuple[datetime, datetime] | None:
        return (self.hours[0], self.hours[-1]) if self.hours else None


def node_hour(result: StepResult, i: int, alert: str | None, engine: Engine | None = None) -> NodeHour:
    """The ``explain`` view of node ``i`` in one step (with attribution when ``engine`` is given)."""
    upstream, unexplained, origin = engine.explain_upstream(result, i) if engine else ((), None, None)
    x = result.observed[i] if i < result.observed.shape[0] else np.nan
    score = result.score[i]
    imputed = result.imputed[i]
    return NodeHour(
        hour=format_hour(result.hour),
        observed=None if np.isnan(x) else float(x),
        expected=round(float(result.expected[i]), 2),
        band_low=round(float(result.band_low[i]), 2),
        band_high=round(float(result.band_high[i]), 2),
        score=None if np.isnan(score) else round(float(score), 2),
        warm=bool(result.warm[i]),
        adopted=bool(result.adopted[i]),
        alert=alert,
        own_expected=round(float(result.own_expected[i]), 2),
        neighbours=round(float(result.expected[i] - result.own_expected[i]), 2),
        imputed=None if np.isnan(imputed) else round(float(imputed), 2),
        upstream=upstream,
        unexplained=None if unexplained is None else round(unexplained, 1),
        origin=origin,
    )


def _watch(result: StepResult, engine: Engine, watch: tuple[str, ...],
           trace: dict[str, list[NodeHour]]) -> None:
    kinds = {(a.node, a.kind) for a in result.alerts}
    for node in watch:
        if node in engine.nodes:
            i = engine.nodes.get(node)
            alert = next((k for k in ("surge", "drop") if (node, k) in kinds), None)
            trace.setdefault(node, []).append(node_hour(result, i, alert, engine))


def replay(path: str | Path, config: Config, *, skip_bad: bool = False,
           watch: tuple[str, ...] = (), on_hour: Callable[[int, int | None], None] | None = None,
           ) -> ReplayResult:
    """Run the engine over a whole recording and collect its alerts in hour order."""
    engine = Engine(config)
    out = ReplayResult(engine=engine)
    for event in read_recording(path, skip_bad=skip_bad, on_bad=out.bad_lines.append):
        if isinstance(event, Header):
            out.header = event
        elif isinstance(event, EdgeEvent):
            (engine.add_edge if event.op == "add" else engine.remove_edge)(event.src, event.dst, event.ts)
        elif isinstance(event, CountsEvent):
            result = engine.step(event.hour, event.counts)
            out.alerts.extend(result.alerts)
            out.incidents.extend(result.incidents)
            out.spills.extend(result.spills)
            out.hours.append(event.hour)
            if watch:
                _watch(result, engine, watch, out.trace)
            if on_hour is not None:
                on_hour(len(out.hours), out.header.hours if out.header else None)
    return out
