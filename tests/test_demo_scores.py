"""The whole engine on the bundled demo week, scored against its labels.

The demo site is invented (alerter/scenario.py generates it; replay_data/README.md); these
are the project's own acceptance figures, not an outside check. They pin what the joint
model must deliver and that it beats the seasonal baseline alone where neighbours matter:
naming the root of a propagated surge and grouping a cascade into one incident.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from alerter.commands import own_only
from alerter.config import load_config
from alerter.replay import ReplayResult, replay
from alerter.scoring import Score, load_labels, score_alerts

ROOT = Path(__file__).resolve().parent.parent
RECORDING = ROOT / "replay_data" / "demo_week.jsonl.gz"
LABELS = load_labels(ROOT / "replay_data" / "demo_labels.json")


def _run(config) -> tuple[ReplayResult, Score]:
    result = replay(RECORDING, config)
    return result, score_alerts(result.alerts, LABELS, config.scoring.slack_hours, result.incidents)


@pytest.fixture(scope="module")
def joint() -> tuple[ReplayResult, Score]:
    return _run(load_config())


@pytest.fixture(scope="module")
def alone() -> tuple[ReplayResult, Score]:
    return _run(own_only(load_config()))


def test_joint_model_meets_the_recall_and_precision_bar(joint) -> None:
    s = joint[1].summary
    assert s["surge_event_recall"] >= 0.9 and s["drop_event_recall"] >= 0.9
    assert s["surge_precision"] >= 0.85 and s["drop_precision"] >= 0.85
    assert s["originating_surge_recall"] >= 0.9


def test_true_root_is_named_first_for_propagated_alerts(joint) -> None:
    assert joint[1].summary["root_named_rate"] >= 0.85


def test_one_incident_per_cascade_and_few_incidents_overall(joint) -> None:
    result, score = joint
    assert score.summary["incidents_per_event"] <= 1.5
    latest = {}
    for u in result.incidents:
        latest[u.incident] = u
    for event in (e for e in LABELS.events if e.kind == "section_cascade"):
        holding = {i for i, u in latest.items() if event.root in u.members}
        assert len(holding) == 1, (event.id, holding)
        (inc,) = holding
        alerted = {a.node for a in result.alerts if a.node in event.nodes and event.start <= _h(a.hour) < event.end}
        inside = alerted & set(latest[inc].members)
        # a child whose learned link share is low is attributed mostly to itself and may stand
        # alone (seen: one of 15 alerted nodes of the /business cascade); most must join
        assert len(inside) >= 0.85 * len(alerted), (event.id, alerted - inside)
        assert latest[inc].root == event.root


def test_joint_beats_the_baseline_alone_on_propagated_events(joint, alone) -> None:
    j, a = joint[1].summary, alone[1].summary
    assert a["root_named_rate"] != a["root_named_rate"]  # NaN: the baseline alone names no one
    assert j["root_named_rate"] >= 0.85
    assert j["incidents_per_event"] < a["incidents_per_event"] / 2
    assert j["surge_event_recall"] >= a["surge_event_recall"]


def test_level_shifts_are_adopted_not_alerted_for_ever(joint) -> None:
    result, _ = joint
    for event in (e for e in LABELS.events if not e.alert_expected):
        late = [a for a in result.alerts if a.node in event.nodes and _h(a.hour) >= event.start
                and (_h(a.hour) - event.start).total_seconds() > 24 * 3600]
        assert late == [], (event.id, late)


def _h(text: str):
    from alerter.timeaxis import parse_hour

    return parse_hour(text)
