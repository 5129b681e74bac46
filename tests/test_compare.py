"""`alerter compare`: one recording replayed under the config in use and a proposed one.

Its lists are checked against two replays run here directly, and its labelled verdicts
against the scorer's own counts of true alerts (two independent computations of the same
fact: an alert that falls on a labelled event).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from alerter.cli import main
from alerter.commands import DEMO_LABELS, DEMO_RECORDING
from alerter.config import load_config
from alerter.replay import replay
from alerter.scoring import load_labels, score_alerts

from .helpers import small_recording

STRICT_SURGES = "rules:\n  surge:\n    z: 50.0\n"
LOOSE_DROPS = "rules:\n  surge:\n    min_ratio: 1.5\n  drop:\n    z: 3.0\n    min_excess: 5\n"


def _compare(capsys: pytest.CaptureFixture[str], *args: str) -> dict:
    assert main(["compare", *args, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def _keys(alerts: list) -> list[tuple[str, str, str]]:
    """(node, hour, kind) of alert records or of their JSON form, sorted."""
    return sorted((a["node"], a["hour"], a["kind"]) if isinstance(a, dict) else (a.node, a.hour, a.kind)
                  for a in alerts)


def test_a_stricter_surge_rule_drops_exactly_the_surges_replay_loses(tmp_path: Path,
                                                                      capsys: pytest.CaptureFixture[str]) -> None:
    rec = small_recording(tmp_path)
    proposed = tmp_path / "strict.yaml"
    proposed.write_text(STRICT_SURGES)
    out = _compare(capsys, str(rec), "--config", str(proposed))
    before, after = replay(rec, load_config(None)).alerts, replay(rec, load_config(proposed)).alerts
    assert any(a.kind == "surge" for a in before), "the small recording's surge must alert by default"
    assert _keys(out["dropped"]) == sorted(set(_keys(before)) - set(_keys(after)))
    assert _keys(out["added"]) == sorted(set(_keys(after)) - set(_keys(before)))
    assert {a["kind"] for a in out["dropped"]} == {"surge"}
    assert out["settings"] == [{"key": "rules.surge.z", "current": 4.0, "proposed": 50.0}]
    assert out["current"]["alerts"] == len(before) and out["proposed"]["alerts"] == len(after)
    assert out["kept"] == len(after) - len(out["added"])
    assert all(a["labelled_event"] is None for a in out["dropped"])  # no labels given


def test_on_the_demo_week_labelled_verdicts_agree_with_the_score(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    """Looser drops: many more alerts, most of them false. For each direction, the proposed
    config's true alerts (as the scorer counts them) equal the current config's, minus the
    true ones dropped, plus the true ones added."""
    proposed = tmp_path / "loose.yaml"
    proposed.write_text(LOOSE_DROPS)
    out = _compare(capsys, str(DEMO_RECORDING), "--config", str(proposed), "--labels", str(DEMO_LABELS))
    labels = load_labels(DEMO_LABELS)
    assert out["since"] == "2026-11-16T07:00:00Z" == labels.labelled_from.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert out["added"] and any(a["labelled_event"] is False for a in out["added"])
    for kind in ("surge", "drop"):
        cur, new = out["current"]["score"]["precision"][kind], out["proposed"]["score"]["precision"][kind]
        gained = sum(a["labelled_event"] is True for a in out["added"] if a["kind"] == kind)
        lost = sum(a["labelled_event"] is True for a in out["dropped"] if a["kind"] == kind)
        assert new["true"] == cur["true"] - lost + gained
        assert new["alerts"] == out["proposed"][kind]
    # the scorer run here on its own gives the same current-config figures
    own = score_alerts(replay(DEMO_RECORDING, load_config(None)).alerts, labels)
    assert own.precision == out["current"]["score"]["precision"]
    changed = {s["key"] for s in out["settings"]}
    assert changed == {"rules.surge.min_ratio", "rules.drop.z", "rules.drop.min_excess"}  # drop keeps its defaults


def test_text_output_and_bad_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rec = small_recording(tmp_path)
    proposed = tmp_path / "strict.yaml"
    proposed.write_text(STRICT_SURGES)
    png = tmp_path / "compare.png"
    assert main(["compare", str(rec), "--config", str(proposed), "--plot", str(png)]) == 0
    text = capsys.readouterr().out
    assert f"wrote plot to {png}" in text
    import matplotlib.image

    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and matplotlib.image.imread(png).shape[:2] == (320, 1200)
    assert "1 setting(s) differ" in text and "rules.surge.z" in text
    assert "dropped by the proposed config" in text and "no alert added by the proposed config" in text
    assert main(["compare", str(rec), "--config", str(proposed), "--since", "yesterday"]) == 2
    assert "--since" in capsys.readouterr().err
    assert main(["compare", str(rec), "--config", str(tmp_path / "missing.yaml")]) == 2
    assert "missing.yaml" in capsys.readouterr().err
    with pytest.raises(SystemExit):  # --config is required: argparse says so
        main(["compare", str(rec)])
