"""What a proposed config would change over a recording, against the config in use.

An analyst about to ship a threshold change needs three answers from last week's data:
which settings the two files really differ in, how many alerts and incidents each would have
raised, and which alerts the change drops or adds (with labels: were those true events or
false alarms?). Both configs run the same replay; this module only compares the results.

Alerts are matched by (node, hour, kind). An alert present under both configs counts as
kept even when its figures differ: a wider band changes the numbers, not the alert.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

from .config import Config
from .incidents import IncidentUpdate
from .records import Alert
from .scoring import Labels, Score, matches_event, score_alerts
from .timeaxis import format_hour, within

__all__ = ["AlertDiff", "Comparison", "compare_runs", "diff_alerts", "labelled", "setting_changes", "side_counts"]

Key = tuple[str, str, str]


def _key(a: Alert) -> Key:
    return a.node, a.hour, a.kind


@dataclass(frozen=True)
class AlertDiff:
    """The alerts of two runs matched by (node, hour, kind), each list in hour order."""

    kept: tuple[Alert, ...]  # the proposed run's records of the alerts both raised
    dropped: tuple[Alert, ...]  # raised with the current config only
    added: tuple[Alert, ...]  # raised with the proposed config only


def _window(alerts: Sequence[Alert], since: datetime | None) -> list[Alert]:
    return [a for a in alerts if within(a.hour, since)]


def diff_alerts(current: Sequence[Alert], proposed: Sequence[Alert], since: datetime | None = None) -> AlertDiff:
    """Match the two runs' alerts from ``since`` on (all of them when None).

    >>> from alerter.records import Alert
    >>> a = Alert.build(node="/a", hour="2026-11-20T10:00:00Z", kind="surge", observed=90, expected=30,
    ...                 band_low=10, band_high=60, score=4.0, rule="surge", streak=1)
    >>> b = Alert.build(node="/b", hour="2026-11-20T11:00:00Z", kind="drop", observed=1, expected=30,
    ...                 band_low=10, band_high=60, score=-4.0, rule="drop", streak=1)
    >>> d = diff_alerts([a, b], [a])
    >>> len(d.kept), [x.node for x in d.dropped], d.added
    (1, ['/b'], ())
    """
    cur, new = _window(current, since), _window(proposed, since)
    cur_keys, new_keys = {_key(a) for a in cur}, {_key(a) for a in new}
    order = lambda a: (a.hour, a.node, a.kind)  # noqa: E731 - a sort key
    return AlertDiff(kept=tuple(sorted((a for a in new if _key(a) in cur_keys), key=order)),
                     dropped=tuple(sorted((a for a in cur if _key(a) not in new_keys), key=order)),
                     added=tuple(sorted((a for a in new if _key(a) not in cur_keys), key=order)))


def side_counts(alerts: Sequence[Alert], incidents: Sequence[IncidentUpdate],
                since: datetime | None = None) -> dict[str, int]:
    """Alerts by kind and incidents opened (what reaches chat: one message each, then updates)."""
    mine = _window(alerts, since)
    opened = {u.incident for u in incidents if within(u.start, since)}
    return {"alerts": len(mine), "surge": sum(a.kind == "surge" for a in mine),
            "drop": sum(a.kind == "drop" for a in mine), "incidents": len(opened)}


def labelled(alerts: Sequence[Alert], labels: Labels | None, slack_hours: int) -> list[bool | None]:
    """Per alert: True when it falls on a labelled event (its node, direction and hours, as the
    score counts it), False when not, None when there are no labels or it is before them."""
    if labels is None:
        return [None] * len(alerts)
    slack = timedelta(hours=slack_hours)
    wanted = [e for e in labels.events if e.alert_expected]
    return [any(matches_event(a, e, slack) for e in wanted) if within(a.hour, labels.labelled_from) else None
            for a in alerts]


def _flat(data: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in data.items():
        name = f"{prefix}{k}"
        if isinstance(v, Mapping) and v:
            out.update(_flat(v, name + "."))
        else:
            out[name] = v
    return out


def setting_changes(current: Config, proposed: Config) -> list[tuple[str, Any, Any]]:
    """``(dotted key, current value, proposed value)`` of every setting that differs, sorted by
    key; a list (such as ``rules.overrides``) is compared whole.

    >>> from alerter.config import Config
    >>> base = Config()
    >>> surge = base.rules.surge.model_copy(update={"cooldown_hours": 12})
    >>> tuned = base.model_copy(update={"rules": base.rules.model_copy(update={"surge": surge})})
    >>> setting_changes(base, tuned)
    [('rules.surge.cooldown_hours', 6, 12)]
    """
    a, b = _flat(current.model_dump(mode="json")), _flat(proposed.model_dump(mode="json"))
    return [(k, a.get(k), b.get(k)) for k in sorted(a.keys() | b.keys()) if a.get(k) != b.get(k)]


@dataclass(frozen=True)
class Comparison:
    """Everything ``alerter compare`` shows: per side (current, proposed) its counts and score."""

    since: datetime | None
    settings: list[tuple[str, Any, Any]]
    diff: AlertDiff
    counts: tuple[dict[str, int], dict[str, int]]
    scores: tuple[Score | None, Score | None]
    truth: dict[str, list[bool | None]]  # "dropped" / "added": per alert, on a labelled event?

    def to_dict(self) -> dict[str, Any]:
        sides = {name: {**c, "score": s.to_dict() if s else None}
                 for name, c, s in zip(("current", "proposed"), self.counts, self.scores, strict=True)}
        lists = {name: [{**a.to_dict(), "labelled_event": t}
                        for a, t in zip(alerts, self.truth[name], strict=True)]
                 for name, alerts in (("dropped", self.diff.dropped), ("added", self.diff.added))}
        return {"since": format_hour(self.since) if self.since else None, "kept": len(self.diff.kept),
                "settings": [{"key": k, "current": a, "proposed": b} for k, a, b in self.settings],
                **sides, **lists}


Run = tuple[Sequence[Alert], Sequence[IncidentUpdate]]  # a replay's alerts and incident updates


def compare_runs(current: Config, proposed: Config, runs: Sequence[Run], labels: Labels | None,
                 since: datetime | None) -> Comparison:
    """Compare the (alerts, incident updates) of a replay under each config. Both sides are
    scored with the proposed config's ``scoring.slack_hours``, so only the rules differ."""
    slack = proposed.scoring.slack_hours
    diff = diff_alerts(runs[0][0], runs[1][0], since)
    counts = (side_counts(*runs[0], since), side_counts(*runs[1], since))
    scores = tuple(score_alerts(list(a), labels, slack, list(u)) if labels else None for a, u in runs)
    truth = {"dropped": labelled(diff.dropped, labels, slack), "added": labelled(diff.added, labels, slack)}
    return Comparison(since, setting_changes(current, proposed), diff, counts, (scores[0], scores[1]), truth)
