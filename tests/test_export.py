"""`alerter record`: the input streams in Redis written back as a recording. Replayed, it
must give the alerts and incident updates the live service put in its outbox, byte for
byte: the incident reviewer's replay of last week is then the week the on-call engineer
got. Malformed entries and counts the service set aside as late are left out, as the
service left them out."""

from __future__ import annotations

import json
from datetime import timedelta
from pathlib import Path

import pytest

from alerter.cli import main
from alerter.commands import DEMO_RECORDING
from alerter.config import Config, load_config
from alerter.export import export_streams
from alerter.producer import push_recording
from alerter.recording import EdgeEvent, read_recording
from alerter.records import dumps
from alerter.replay import replay
from alerter.service import Service
from alerter.store import Store
from alerter.wire import encode_count, encode_edge

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures
from .helpers import START, outbox_of, small_recording, split_recording

IN = "alerter:{p0}:in"


def _record(capsys: pytest.CaptureFixture[str], out: Path, url: str, *more: str) -> dict:
    capsys.readouterr()
    assert main(["record", str(out), "--redis", url, *more, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


@pytest.mark.skipif(not DEMO_RECORDING.exists(), reason="demo recording not generated yet")
def test_the_recorded_demo_week_replays_to_the_services_outbox(tmp_path: Path, store: Store,  # noqa: F811
                                                               redis_url: str,  # noqa: F811
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    config = Config()
    push_recording(DEMO_RECORDING, store, config.live)
    store.append(IN, [{"type": "count", "node": "/news", "hour": "not an hour", "count": "3"}])  # malformed
    store.append(IN, [encode_count("/news", START + timedelta(hours=30), 99999)])  # hour 30 is closed: late
    Service(config, store, drained=True).run(install_signals=False)
    assert store.length("alerter:{p0}:late") == 1 and store.length("alerter:{p0}:dead") == 1

    out = tmp_path / "week.jsonl.gz"
    summary = _record(capsys, out, redis_url)
    assert summary["dead"] == 1 and summary["late"] == 1 and summary["hours"] == 504
    edges = [e for e in read_recording(DEMO_RECORDING) if isinstance(e, EdgeEvent)]
    assert summary["edges"] == len(edges) > 5000
    again = replay(out, config)
    assert [dumps(a) for a in again.alerts] == outbox_of(store, 0, b"alert", b"alert") != []
    assert [dumps(u) for u in again.incidents] == outbox_of(store, 0, b"incident", b"incident") != []


def test_two_partitions_and_a_link_event_without_a_time(tmp_path: Path, store: Store,  # noqa: F811
                                                         redis_url: str,  # noqa: F811
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    """A producer adds a link mid-stream with no time (as from redis-cli): the engine dates it
    to the next hour, and so does the recording. Two partitions' hours are merged into one."""
    cfg_file = tmp_path / "two.yaml"
    cfg_file.write_text("live:\n  partitions: 2\n")
    config = load_config(cfg_file)
    first, second = split_recording(small_recording(tmp_path), 150)
    push_recording(first, store, config.live)
    store.append("alerter:{p1}:in", [encode_edge("add", "/cold", "/hot")])  # '/hot' is in partition 1
    push_recording(second, store, config.live)
    assert main(["run", "--until-drained", "--redis", redis_url, "--config", str(cfg_file), "--json"]) == 0

    out = tmp_path / "two.jsonl"
    summary = _record(capsys, out, redis_url, "--config", str(cfg_file))
    assert summary["partitions"] == 2 and summary["hours"] == 240 and summary["edges"] == 2
    added = [e for e in read_recording(out) if isinstance(e, EdgeEvent) and e.src == "/cold"]
    assert [e.ts for e in added] == [START + timedelta(hours=150)]
    live = sorted(outbox_of(store, 0, b"alert", b"alert") + outbox_of(store, 1, b"alert", b"alert"))
    assert sorted(dumps(a) for a in replay(out, config).alerts) == live != []
    seen: list[tuple[int, int | None]] = []  # the progress callback: rising, and ends at all entries
    again = export_streams(store, config.live, tmp_path / "again.jsonl", "UTC", on_entry=lambda k, n: seen.append((k, n)))
    assert seen[-1] == (summary["entries"], summary["entries"]) == (again.entries, again.entries)
    assert [k for k, _ in seen] == sorted(k for k, _ in seen)


def test_record_says_what_is_wrong(tmp_path: Path, redis_url: str,  # noqa: F811
                                   capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["record", str(tmp_path / "no" / "such" / "w.jsonl"), "--redis", redis_url]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_live_reads_the_streams_like_the_file_it_came_from(tmp_path: Path, store: Store,  # noqa: F811
                                                           redis_url: str,  # noqa: F811
                                                           capsys: pytest.CaptureFixture[str]) -> None:
    """``--live`` on replay, explain, graph and compare: the input streams in Redis, read as
    ``alerter record`` reads them, give what the pushed file gives."""
    rec = small_recording(tmp_path)
    assert main(["replay", "--live", "--redis", redis_url]) == 2  # nothing pushed yet
    assert "hold no counts" in capsys.readouterr().err
    push_recording(rec, store, Config().live)
    capsys.readouterr()
    hour = "2026-11-10T15:00:00Z"
    for args in (["replay"], ["explain", "/hot", "--at", hour], ["graph", "/"]):
        assert main([*args, str(rec), "--json"]) == 0
        from_file = json.loads(capsys.readouterr().out)
        assert main([*args, "--live", "--redis", redis_url, "--json"]) == 0
        from_redis = json.loads(capsys.readouterr().out)
        from_file.pop("recording", None), from_redis.pop("recording", None)
        assert from_redis == from_file and from_file
    strict = tmp_path / "strict.yaml"
    strict.write_text("rules:\n  surge:\n    z: 50.0\n")
    assert main(["compare", "--live", "--redis", redis_url, "--config", str(strict), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["dropped"]
    assert main(["replay", "--json"]) == 2
    assert "RECORDING file or --live" in capsys.readouterr().err
    assert main(["replay", str(rec), "--live"]) == 2
    assert "not both" in capsys.readouterr().err
