"""Score alerts against labelled events: precision per direction, recall per kind.

An alert matches an event when it names one of the event's nodes, has the event's
direction, and falls in ``[start, end + slack)``. Only alerts at or after the labels'
``labelled_from`` hour are scored. Alerts on an event marked ``alert_expected: false``
(a level shift the baseline should adopt) count as false alarms.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

from .errors import LabelsError
from .incidents import IncidentUpdate
from .records import Alert
from .timeaxis import parse_hour

__all__ = ["LabelledEvent", "Labels", "Score", "load_labels", "matches_event", "score_alerts"]


@dataclass(frozen=True)
class LabelledEvent:
    id: str
    kind: str
    direction: str
    root: str
    nodes: dict[str, str]  # node -> "root" | "propagated"
    start: datetime
    end: datetime
    alert_expected: bool = True
    root_changes_traffic: bool = True


@dataclass(frozen=True)
class Labels:
    labelled_from: datetime
    events: list[LabelledEvent]


def _event(raw: dict[str, Any]) -> LabelledEvent:
    return LabelledEvent(
        id=str(raw["id"]), kind=str(raw["kind"]), direction=str(raw["direction"]),
        root=str(raw["root"]), nodes={str(k): str(v) for k, v in raw["nodes"].items()},
        start=parse_hour(raw["start"]), end=parse_hour(raw["end"]),
        alert_expected=bool(raw.get("alert_expected", True)),
        root_changes_traffic=bool(raw.get("root_changes_traffic", True)),
    )


def load_labels(path: str | Path) -> Labels:
    """Read an ``alerter-labels/1`` JSON file."""
    path = Path(path)
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
        events = [_event(e) for e in raw["events"]]
        return Labels(parse_hour(raw["labelled_from"]), events)
    except OSError as exc:
        raise LabelsError(f"{path}: cannot read labels: {exc.strerror}") from exc
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise LabelsError(f"{path}: not an alerter-labels/1 file: {exc!r}") from exc


@dataclass
class Score:
    """The figures of one scoring, ready for a table or ``--json``."""

    precision: dict[str, dict[str, float]] = field(default_factory=dict)
    recall: dict[str, dict[str, float]] = field(default_factory=dict)
    summary: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"precision": self.precision, "recall": self.recall, "summary": self.summary}


def matches_event(alert: Alert, event: LabelledEvent, slack: timedelta) -> bool:
    """True when the alert is on one of the event's nodes, in its direction, between its start
    and its end plus ``slack`` hours (how the score counts a true alert)."""
    if alert.node not in event.nodes or alert.kind != event.direction:
        return False
    hour = parse_hour(alert.hour)
    return event.start <= hour < event.end + slack


def _ratio(num: float, den: float) -> float:
    return round(num / den, 4) if den else float("nan")


def score_alerts(alerts: list[Alert], labels: Labels, slack_hours: int = 3,
                 incidents: list[IncidentUpdate] | None = None) -> Score:
    """Precision per alert direction, recall per event kind and node role, root naming.

    ``root_named_rate``: of the alerts that caught a propagated node of an event, the share
    whose top-named upstream neighbour is the event's root (NaN when the alerts carry no
    attribution). With ``incidents``, ``incidents_per_event`` compares the number of
    incidents opened in the labelled period with the number of events that expect alerts.
    """
    slack = timedelta(hours=slack_hours)
    scored = [a for a in alerts if parse_hour(a.hour) >= labels.labelled_from]
    wanted = [e for e in labels.events if e.alert_expected]
    hits: dict[str, set[str]] = {e.id: set() for e in wanted}
    named: list[bool] = []
    out = Score()
    for direction in ("surge", "drop"):
        mine = [a for a in scored if a.kind == direction]
        good = 0
        for a in mine:
            matched = [e for e in wanted if matches_event(a, e, slack)]
            for e in matched:
                hits[e.id].add(a.node)
                if e.nodes.get(a.node) == "propagated" and a.origin is not None:
                    named.append(bool(a.upstream) and a.upstream[0].node == e.root)
            good += bool(matched)
        out.precision[direction] = {"alerts": len(mine), "true": good, "precision": _ratio(good, len(mine))}
    for kind in sorted({e.kind for e in wanted}):
        events = [e for e in wanted if e.kind == kind]
        found = sum(bool(hits[e.id]) for e in events)
        out.recall[kind] = {"events": len(events), "detected": found, "recall": _ratio(found, len(events))}
    out.summary = _summary(wanted, hits, out)
    out.summary["root_named_rate"] = _ratio(sum(named), len(named))
    if incidents is not None:
        opened = {u.incident for u in incidents if parse_hour(u.hour) >= labels.labelled_from}
        out.summary["incidents"] = float(len(opened))
        out.summary["incidents_per_event"] = _ratio(len(opened), len(wanted))
    return out


def _summary(wanted: list[LabelledEvent], hits: dict[str, set[str]], score: Score) -> dict[str, float]:
    origin = [e for e in wanted if e.direction == "surge" and e.root_changes_traffic]
    prop = [(e, n) for e in wanted for n, role in e.nodes.items() if role == "propagated"]
    drops = [e for e in wanted if e.direction == "drop"]
    surges = [e for e in wanted if e.direction == "surge"]
    return {
        "originating_surge_recall": _ratio(sum(e.root in hits[e.id] for e in origin), len(origin)),
        "propagated_node_recall": _ratio(sum(n in hits[e.id] for e, n in prop), len(prop)),
        "surge_event_recall": _ratio(sum(bool(hits[e.id]) for e in surges), len(surges)),
        "drop_event_recall": _ratio(sum(bool(hits[e.id]) for e in drops), len(drops)),
        "surge_precision": score.precision["surge"]["precision"],
        "drop_precision": score.precision["drop"]["precision"],
    }
