"""Scoring alerts against labels: matching window, precision, recall, unwanted alerts."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from alerter.errors import LabelsError
from alerter.records import Alert
from alerter.scoring import load_labels, score_alerts


def _alert(node: str, hour: str, kind: str = "surge") -> Alert:
    return Alert.build(node=node, hour=hour, kind=kind, observed=300, expected=100, band_low=50,
                       band_high=200, score=6, rule=f"{kind}:default", streak=1)


LABELS = {
    "format": "alerter-labels/1", "labelled_from": "2026-11-16T07:00:00Z",
    "events": [
        {"id": "E1", "kind": "referral_surge", "direction": "surge", "root": "/a", "nodes": {"/a": "root"},
         "start": "2026-11-17T10:00:00Z", "end": "2026-11-17T14:00:00Z"},
        {"id": "E2", "kind": "section_cascade", "direction": "surge", "root": "/s",
         "nodes": {"/s": "root", "/s/1": "propagated", "/s/2": "propagated"},
         "start": "2026-11-18T10:00:00Z", "end": "2026-11-18T12:00:00Z"},
        {"id": "E3", "kind": "outage", "direction": "drop", "root": "/o", "nodes": {"/o": "root"},
         "start": "2026-11-19T10:00:00Z", "end": "2026-11-19T16:00:00Z"},
        {"id": "E4", "kind": "level_shift", "direction": "surge", "root": "/l", "nodes": {"/l": "root"},
         "start": "2026-11-19T00:00:00Z", "end": "2026-11-23T07:00:00Z", "alert_expected": False},
    ],
}


@pytest.fixture()
def labels(tmp_path: Path):
    path = tmp_path / "labels.json"
    path.write_text(json.dumps(LABELS))
    return load_labels(path)


def test_precision_and_recall(labels) -> None:
    alerts = [
        _alert("/a", "2026-11-17T16:00:00Z"),           # end + 2 h: inside the 3 h slack
        _alert("/s/1", "2026-11-18T10:00:00Z"),         # propagated node of E2, root missed
        _alert("/o", "2026-11-19T11:00:00Z", "surge"),  # wrong direction: false alarm
        _alert("/l", "2026-11-20T00:00:00Z"),           # unwanted: level shift
        _alert("/z", "2026-11-10T00:00:00Z"),           # before labelled_from: not scored
    ]
    score = score_alerts(alerts, labels, slack_hours=3)
    assert score.precision["surge"] == {"alerts": 4, "true": 2, "precision": 0.5}
    assert score.precision["drop"]["alerts"] == 0
    assert score.recall["referral_surge"]["recall"] == 1.0
    assert score.recall["section_cascade"]["detected"] == 1
    assert score.recall["outage"]["recall"] == 0.0
    assert "level_shift" not in score.recall
    assert score.summary["originating_surge_recall"] == 0.5   # E1 at its root, E2 not at /s
    assert score.summary["propagated_node_recall"] == 0.5


def test_slack_bounds_the_window(labels) -> None:
    late = score_alerts([_alert("/a", "2026-11-17T17:00:00Z")], labels, slack_hours=3)
    early = score_alerts([_alert("/a", "2026-11-17T09:00:00Z")], labels, slack_hours=3)
    assert late.precision["surge"]["true"] == 0 and early.precision["surge"]["true"] == 0


def test_bad_labels_file(tmp_path: Path) -> None:
    path = tmp_path / "l.json"
    path.write_text('{"events": [{"id": 1}]}')
    with pytest.raises(LabelsError, match="not an alerter-labels/1 file"):
        load_labels(path)
