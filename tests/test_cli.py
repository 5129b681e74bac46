"""The command line: tables and JSON out, clear errors and non-zero exits, never a traceback."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from alerter.cli import main

from .helpers import small_recording


def test_replay_finds_the_injected_surge_and_writes_jsonl(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rec = small_recording(tmp_path)
    out = tmp_path / "alerts.jsonl"
    assert main(["replay", str(rec), "--out", str(out)]) == 0
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    hot = [r for r in rows if r["node"] == "/hot" and r["kind"] == "surge"]
    assert [r["hour"] for r in hot] == ["2026-11-10T15:00:00Z"]  # START + 200 h
    assert hot[0]["observed"] > 3 * hot[0]["expected"]
    text = capsys.readouterr().out
    assert "/hot" in text and "surge" in text and "alert(s)" in text


def test_replay_json_summary(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["replay", str(small_recording(tmp_path)), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["hours"] == 240 and data["nodes"] == 3 and data["alerts"] >= 1


def test_explain_shows_history_and_marks_the_alert(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rec = small_recording(tmp_path)
    png = tmp_path / "hot.png"
    assert main(["explain", "/hot", "--at", "2026-11-10T15:00:00Z", str(rec), "--window", "3",
                 "--json", "--plot", str(png)]) == 0
    data = json.loads(capsys.readouterr().out)
    assert len(data["hours"]) == 7
    marked = [h for h in data["hours"] if h["alert"]]
    assert [h["hour"] for h in marked] == ["2026-11-10T15:00:00Z"]
    assert all(h["band_low"] <= h["expected"] <= h["band_high"] for h in data["hours"])
    assert png.stat().st_size > 5000 and png.read_bytes()[:4] == b"\x89PNG"


@pytest.mark.parametrize(("args", "needle"), [
    (["explain", "/hott", "--at", "2026-11-10T15:00:00Z"], "unknown node '/hott'; the stream never mentioned it; did you mean /hot"),
    (["explain", "/hot", "--at", "2027-01-01T00:00:00Z"], "outside the recording (2026-11-02T07:00:00Z .. 2026-11-12T06:00:00Z)"),
    (["explain", "/hot", "--at", "noon"], "--at: not an ISO 8601 time"),
])
def test_explain_bad_input(tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], needle: str) -> None:
    rec = small_recording(tmp_path)
    assert main(args[:2] + [args[2], args[3], str(rec)]) == 2
    assert needle.replace("; the stream", ": the stream") in capsys.readouterr().err


def test_malformed_line_stops_unless_skip_bad(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rec = small_recording(tmp_path)
    lines = rec.read_text().splitlines()
    lines.insert(5, '{"type":"counts","hour":"bad"}')
    rec.write_text("\n".join(lines) + "\n")
    assert main(["replay", str(rec)]) == 2
    err = capsys.readouterr().err
    assert f"{rec}:6:" in err and "Traceback" not in err
    assert main(["replay", str(rec), "--skip-bad", "--json"]) == 0
    captured = capsys.readouterr()
    assert f"skipped bad line {rec}:6:" in captured.err
    assert json.loads(captured.out)["bad_lines"] == 1


def test_missing_recording_and_bad_config(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["replay", str(tmp_path / "none.jsonl")]) == 2
    assert "none.jsonl: no such file" in capsys.readouterr().err
    cfg = tmp_path / "bad.yaml"
    cfg.write_text("rules:\n  surge:\n    z: many\n")
    assert main(["replay", str(small_recording(tmp_path)), "--config", str(cfg)]) == 2
    assert f"{cfg}:3: rules.surge.z = 'many'" in capsys.readouterr().err


def test_two_processes_write_byte_identical_alert_files(tmp_path: Path) -> None:
    """The reviewer's replay must give the same answer every time, in separate processes."""
    rec = small_recording(tmp_path, "rec.jsonl.gz")
    outs = []
    for k in range(2):
        out = tmp_path / f"run{k}.jsonl"
        subprocess.run([sys.executable, "-m", "alerter.cli", "replay", str(rec), "--out", str(out), "--json"],
                       check=True, capture_output=True)
        outs.append(out.read_bytes())
    assert outs[0] == outs[1] and len(outs[0]) > 0


def test_graph_lists_neighbours_with_learned_shares(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rec = small_recording(tmp_path)
    assert main(["graph", "/", str(rec), "--direction", "down", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [(n["hops"], n["node"], n["via"]) for n in data["neighbours"]] == [(1, "/hot", "/")]
    assert 0.0 <= data["neighbours"][0]["share"] <= 1.0
    assert main(["graph", "/hot", str(rec), "--direction", "up"]) == 0
    assert "upstream of /hot" in capsys.readouterr().out
    assert main(["graph", "/nope", str(rec)]) == 2
    assert "unknown node '/nope'" in capsys.readouterr().err
    assert main(["graph", "/", str(rec), "--hops", "0"]) == 2


def test_replay_window_shows_and_writes_one_day_and_scores_the_labelled_week(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``--since/--until`` cut what is shown and written, not what the engine learns from:
    the day's alerts are the whole replay's alerts of that day, byte for byte, and the score
    (over the labelled week) is the whole replay's."""
    from alerter.commands import DEMO_LABELS, DEMO_RECORDING

    whole, day = tmp_path / "whole.jsonl", tmp_path / "day.jsonl"
    assert main(["replay", str(DEMO_RECORDING), "--out", str(whole), "--labels", str(DEMO_LABELS), "--json"]) == 0
    full = json.loads(capsys.readouterr().out)
    assert main(["replay", str(DEMO_RECORDING), "--out", str(day), "--labels", str(DEMO_LABELS), "--json",
                 "--since", "2026-11-18T00:00:00Z", "--until", "2026-11-18T23:00:00Z"]) == 0
    cut = json.loads(capsys.readouterr().out)
    expected = [line for line in whole.read_text().splitlines() if '"hour":"2026-11-18T' in line]
    assert expected and day.read_text().splitlines() == expected and cut["alerts"] == len(expected)
    assert cut["score"] == full["score"] and full["alerts"] > len(expected)
    assert main(["replay", str(DEMO_RECORDING), "--since", "2026-11-19T00:00:00Z",
                 "--until", "2026-11-18T00:00:00Z"]) == 2
    assert "before --since" in capsys.readouterr().err


def test_node_ids_with_brackets_print_as_they_are(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Node ids are user data: ``[/b]`` or ``[red]`` in one must print literally, not as
    terminal markup (a closing tag without its opening one used to raise a traceback)."""
    from .helpers import daily_counts, write_recording

    odd = "/search?q=[/b]"
    series = {"/": daily_counts(240, 800, 1), odd: daily_counts(240, 120, 2), "/tag/[red]hot": daily_counts(240, 60, 3)}
    rec = write_recording(tmp_path / "odd.jsonl", series, surge={odd: (200, 6.0)}, edges=[("/", odd)])
    assert main(["replay", str(rec)]) == 0
    text = capsys.readouterr().out
    assert odd in text
    assert main(["explain", "/tag/[red]hot", "--at", "2026-11-10T15:00:00Z", str(rec)]) == 0
    assert "/tag/[red]hot" in capsys.readouterr().out
    dollar = "/deal$\\frac$5"  # "$...$" would be matplotlib math text, and this one does not parse
    series = {"/": daily_counts(240, 800, 1), dollar: daily_counts(240, 120, 2)}
    rec = write_recording(tmp_path / "dollar.jsonl", series, surge={dollar: (200, 6.0)}, edges=[("/", dollar)])
    png = tmp_path / "dollar.png"
    assert main(["explain", dollar, "--at", "2026-11-10T15:00:00Z", str(rec), "--plot", str(png)]) == 0
    assert png.stat().st_size > 10_000
