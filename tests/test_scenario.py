"""The invented demo scenario: reproducible, well-formed, and its labels tell the truth."""

from __future__ import annotations

import re
from collections import Counter
from datetime import timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import networkx as nx
import numpy as np
import pytest

from alerter.recording import read_recording
from alerter.scenario import (
    HOURS,
    Scenario,
    generate,
    labels_bytes,
    recording_bytes,
    write_scenario,
)
from alerter.scoring import load_labels
from alerter.timeaxis import parse_hour

REPLAY = Path(__file__).resolve().parents[1] / "replay_data"
PAGE_ID = re.compile(r"^/$|^/(news|sports|weather|culture|business|opinion|food|outdoors)(/a\d{4})?$")
KINDS = {"referral_surge": 3, "new_link": 2, "section_cascade": 2, "bot_flood": 2,
         "link_removed": 2, "outage": 2, "level_shift": 2}


@pytest.fixture(scope="module")
def demo() -> Scenario:
    return generate()


@pytest.fixture(scope="module")
def table(demo: Scenario) -> tuple[list[str], np.ndarray]:
    """Counts as a pages x hours float array (NaN = missing), plus the hour stamps."""
    row = {p: i for i, p in enumerate(demo.pages)}
    counts = [line for line in demo.lines if line["type"] == "counts"]
    out = np.full((len(demo.pages), len(counts)), np.nan)
    for t, line in enumerate(counts):
        for page, value in line["counts"].items():
            out[row[page], t] = value
    return [line["hour"] for line in counts], out


def _hour(stamp: str) -> int:
    return int((parse_hour(stamp) - parse_hour("2026-11-02T07:00:00Z")).total_seconds()) // 3600


def _edges_at(demo: Scenario, hour: int) -> set[tuple[str, str]]:
    """Links in force for the counts line of ``hour``, replayed from the recording lines."""
    edges: set[tuple[str, str]] = set()
    seen = -1
    for line in demo.lines:
        if line["type"] == "counts":
            seen += 1
            if seen == hour:
                break
        elif line["type"] == "edge_add":
            edges.add((line["src"], line["dst"]))
        elif line["type"] == "edge_remove":
            edges.discard((line["src"], line["dst"]))
    return edges


def test_committed_files_are_what_the_default_seed_writes(demo: Scenario) -> None:
    hint = "replay_data/ drifted from the generator: run 'alerter scenario --seed 20261102 --out replay_data/'"
    assert (REPLAY / "demo_week.jsonl.gz").read_bytes() == recording_bytes(demo), hint
    assert (REPLAY / "demo_labels.json").read_bytes() == labels_bytes(demo), hint


def test_same_seed_gives_identical_bytes_and_another_seed_does_not(tmp_path: Path) -> None:
    first = write_scenario(generate(seed=5, n_pages=400), tmp_path / "a")
    again = write_scenario(generate(seed=5, n_pages=400), tmp_path / "b")
    other = write_scenario(generate(seed=6, n_pages=400), tmp_path / "c")
    assert [p.name for p in first] == ["demo_week.jsonl.gz", "demo_labels.json"]
    assert [p.read_bytes() for p in first] == [p.read_bytes() for p in again]
    assert first[0].read_bytes() != other[0].read_bytes()


def test_too_few_pages_is_refused() -> None:
    with pytest.raises(ValueError, match="n_pages"):
        generate(n_pages=100)


def test_recording_reads_back_with_the_project_reader() -> None:
    events = list(read_recording(REPLAY / "demo_week.jsonl.gz"))
    header = events[0]
    assert (header.format, header.site, header.tz, header.hours) == (
        "alerter-recording/1", "Fernhollow Courier", "America/Denver", HOURS)
    assert header.start.astimezone(ZoneInfo("America/Denver")).strftime("%a %H:%M") == "Mon 00:00"
    assert sum(type(e).__name__ == "CountsEvent" for e in events) == HOURS
    assert (REPLAY / "demo_week.jsonl.gz").stat().st_size <= 5_000_000


def test_line_order_edges_before_the_counts_they_affect(demo: Scenario) -> None:
    lines = demo.lines
    assert lines[0]["type"] == "header" and lines[0]["seed"] == 20261102
    first_counts = next(k for k, line in enumerate(lines) if line["type"] == "counts")
    assert first_counts > 1000 and all(line["ts"] == lines[0]["start"] for line in lines[1:first_counts])
    hours = [line["hour"] for line in lines if line["type"] == "counts"]
    assert hours == sorted(set(hours)) and len(hours) == HOURS
    pending: list[dict] = []
    present: set[str] = set()
    for line in lines[1:]:
        if line["type"] != "counts":
            pending.append(line)
            continue
        assert all(e["ts"] == line["hour"] for e in pending)
        for e in pending:
            assert {e["src"], e["dst"]} <= present | set(line["counts"])
        if present:  # after hour 0, a page that first appears brings its links just before
            assert set(line["counts"]) - present <= {e["dst"] for e in pending if e["type"] == "edge_add"}
        present |= set(line["counts"])
        pending = []
    assert len(present) == len(demo.pages)
    assert all(PAGE_ID.match(p) for p in present)


def test_counts_are_non_negative_integers(demo: Scenario) -> None:
    values = [v for line in demo.lines if line["type"] == "counts" for v in line["counts"].values()]
    assert all(type(v) is int and v >= 0 for v in values)
    assert max(values) > 20_000 and min(values) == 0


def test_link_graph_is_a_dag_with_heavy_tailed_in_degree(demo: Scenario) -> None:
    start = demo.lines[0]["start"]
    initial = nx.DiGraph((e["src"], e["dst"]) for e in demo.lines if e["type"] == "edge_add" and e["ts"] == start)
    ever = nx.DiGraph((e["src"], e["dst"]) for e in demo.lines if e["type"] == "edge_add")
    assert nx.is_directed_acyclic_graph(ever)
    assert initial.number_of_nodes() >= 1900 and initial.number_of_edges() >= 4000
    degree = np.array([d for _, d in initial.in_degree()])
    assert degree.max() >= 10 * max(np.median(degree), 1.0)
    # Common practice for link graphs: the in-degree CCDF is close to a straight line on
    # log-log axes; its slope (1 - power-law exponent) lies well inside (-3, -0.5).
    k = np.unique(degree[degree > 0])
    ccdf = np.array([(degree >= v).mean() for v in k])
    slope = np.polyfit(np.log(k), np.log(ccdf), 1)[0]
    assert -3.0 < slope < -0.5
    assert demo.max_out_share < 0.6


def test_daily_rhythm_follows_local_time(table: tuple[list[str], np.ndarray]) -> None:
    stamps, counts = table
    zone = ZoneInfo("America/Denver")
    local = np.array([parse_hour(s).astimezone(zone).hour for s in stamps])
    per_page = lambda h: np.nanmean(counts[:, local == h], axis=1)  # noqa: E731
    four, noon = per_page(4), per_page(12)
    assert np.nanmean(four) < 0.5 * np.nanmean(noon)
    assert np.nanmean(four < noon) > 0.8


def test_labels_are_well_formed_and_in_week_three(demo: Scenario) -> None:
    labels = demo.labels
    known = set(demo.pages)
    assert labels["format"] == "alerter-labels/1" and labels["labelled_from"] == "2026-11-16T07:00:00Z"
    assert Counter(e["kind"] for e in labels["events"]) == KINDS
    assert [e["id"] for e in labels["events"]] == [f"E{k:02d}" for k in range(1, 16)]
    for e in labels["events"]:
        assert set(e["nodes"]) <= known and e["nodes"][e["root"]] == "root"
        assert list(e["nodes"].values()).count("root") == 1
        assert 336 <= _hour(e["start"]) < _hour(e["end"]) <= HOURS
        assert e["alert_expected"] is (e["kind"] != "level_shift")
        assert e["root_changes_traffic"] is (e["kind"] not in ("new_link", "link_removed"))
        assert e["direction"] == ("drop" if e["kind"] in ("outage", "link_removed") else "surge")
    timed = sorted((_hour(e["start"]), _hour(e["end"])) for e in labels["events"] if e["kind"] != "level_shift")
    assert all(a[1] <= b[0] for a, b in zip(timed, timed[1:], strict=False))
    roots = [e["root"] for e in labels["events"] if e["root"] != "/"]
    assert len(roots) == len(set(roots))


def test_labels_file_loads_with_the_project_loader() -> None:
    labels = load_labels(REPLAY / "demo_labels.json")
    assert len(labels.events) == 15 and labels.labelled_from == parse_hour("2026-11-16T07:00:00Z")


def _window(demo: Scenario, event: dict) -> tuple[slice, int]:
    return slice(_hour(event["start"]), _hour(event["end"])), demo.pages.index(event["root"])


def test_event_pages_have_decent_volume_and_stated_size(demo: Scenario) -> None:
    for e in demo.labels["events"]:
        window, root = _window(demo, e)
        focus = root
        if e["kind"] in ("new_link", "link_removed"):
            focus = demo.pages.index(next(n for n, r in e["nodes"].items() if r == "propagated"))
        normal, now = demo.normal[focus, window], demo.expected[focus, window]
        assert normal.mean() >= 30
        ratio = now / normal
        expected_range = {"new_link": (3, np.inf), "link_removed": (0, 0.4), "outage": (0, 0),
                          "level_shift": (1, 2.3)}.get(e["kind"], (1, np.inf))
        assert expected_range[0] <= ratio.min() and ratio.max() <= expected_range[1], e["id"]
        if e["kind"] in ("referral_surge", "section_cascade", "bot_flood"):
            assert ratio.max() >= 3, e["id"]


def test_link_events_appear_as_edge_lines(demo: Scenario) -> None:
    edges = [(line["type"], line["ts"], line["src"], line["dst"]) for line in demo.lines if "ts" in line]
    for e in demo.labels["events"]:
        if e["kind"] in ("new_link", "link_removed"):
            target = next(n for n, r in e["nodes"].items() if r == "propagated")
            op = "edge_add" if e["kind"] == "new_link" else "edge_remove"
            assert (op, e["start"], e["root"], target) in edges


def test_bot_flood_does_not_spread(demo: Scenario, table: tuple[list[str], np.ndarray]) -> None:
    _, counts = table
    floods = [e for e in demo.labels["events"] if e["kind"] == "bot_flood"]
    assert len(floods) == 2
    for e in floods:
        window, root = _window(demo, e)
        assert list(e["nodes"]) == [e["root"]]
        children = [demo.pages.index(d) for s, d in _edges_at(demo, window.start) if s == e["root"]]
        assert len(children) >= 2
        before = slice(window.start - 168, window.stop - 168)  # same hours one week earlier
        assert counts[root, window].sum() >= 5 * counts[root, before].sum()
        # other events upstream may nudge them a little, the flood adds nothing
        assert np.allclose(demo.expected[children, window], demo.normal[children, window], rtol=0.05)
        assert counts[children, window].sum() <= 1.5 * counts[children, before].sum() + 20


def test_outage_is_zero_then_missing(demo: Scenario, table: tuple[list[str], np.ndarray]) -> None:
    _, counts = table
    outages = [e for e in demo.labels["events"] if e["kind"] == "outage"]
    assert len(outages) == 2
    for e in outages:
        window, root = _window(demo, e)
        series = counts[root, window.start - 1:window.stop + 1]
        assert series[0] > 0 and series[-1] > 0
        assert np.array_equal(series[1:4], np.zeros(3)) and np.isnan(series[4:7]).all()
        for node, role in e["nodes"].items():
            if role == "propagated":
                i = demo.pages.index(node)
                assert (demo.expected[i, window] <= 0.5 * demo.normal[i, window]).all()


def test_new_pages_appear_mid_recording(demo: Scenario, table: tuple[list[str], np.ndarray]) -> None:
    _, counts = table
    first_seen = np.argmax(~np.isnan(counts), axis=1)
    late = first_seen[first_seen > 0]
    assert 5 <= late.size <= 40
    assert timedelta(hours=int(late.min())) < timedelta(days=14)
