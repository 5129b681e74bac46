"""The live path against a real Redis: replay and push + run agree, late data, dead letters
(fuzzed), restart from a checkpoint with open hours, shutdown on SIGTERM, retries, secrets."""

from __future__ import annotations

import json
import logging
import os
import re
import signal
import subprocess
import sys
import threading
import time
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from alerter.checkpoint import load
from alerter.cli import main
from alerter.commands import DEMO_RECORDING
from alerter.config import Config, LiveSettings, load_config
from alerter.errors import BadEntryError, StoreUnavailableError
from alerter.producer import push_recording
from alerter.recording import EdgeEvent, read_recording
from alerter.records import dumps
from alerter.redis_server import EmbeddedServer, LocalServer, free_port
from alerter.replay import replay
from alerter.service import Service
from alerter.store import Store, connect, with_retry
from alerter.timeaxis import format_hour
from alerter.wire import decode_entry, encode_count, partition_of

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures
from .helpers import START, daily_counts, outbox_of, run_workers, small_recording, write_recording

IN, OUT, DEAD, LATE, CKPT = ("alerter:{p0}:in", "alerter:{p0}:outbox", "alerter:{p0}:dead", "alerter:{p0}:late",
                             "alerter:{p0}:checkpoint")
ROOT = Path(__file__).resolve().parent.parent


def outbox_lines(st_: Store) -> list[str]:
    return [fields[b"alert"].decode() for _, fields in st_.entries(OUT) if fields[b"type"] == b"alert"]


def edgy_recording(tmp_path: Path, name: str = "edgy.jsonl") -> Path:
    """Five nodes, ten days, a surge, a gap hour and edges added and removed mid-stream."""
    series = {f"/n{i}": daily_counts(240, 100 * (i + 1), 10 + i) for i in range(5)}
    series["/n3"][120:124] = np.nan
    path = write_recording(tmp_path / name, series, surge={"/n2": (180, 5.0)}, edges=[("/n0", "/n1")])
    lines = path.read_text().splitlines()
    lines.insert(60, json.dumps({"type": "edge_add", "ts": "2026-11-04T12:00:00Z", "src": "/n1", "dst": "/new"}))
    lines.insert(150, json.dumps({"type": "edge_remove", "ts": "2026-11-08T12:00:00Z", "src": "/n0", "dst": "/n1"}))
    del lines[100]  # a whole hour missing
    path.write_text("\n".join(lines) + "\n")
    return path


def test_replay_and_push_run_agree(tmp_path: Path, store: Store, redis_url: str, capsys: pytest.CaptureFixture[str]) -> None:  # noqa: F811
    rec = edgy_recording(tmp_path)
    out = tmp_path / "replay.jsonl"
    assert main(["replay", str(rec), "--out", str(out)]) == 0
    assert main(["push", str(rec), "--redis", redis_url, "--json"]) == 0
    assert main(["run", "--until-drained", "--redis", redis_url, "--json"]) == 0
    capsys.readouterr()
    expected = out.read_text().splitlines()
    assert expected and outbox_lines(store) == expected
    keys = [f[b"key"] for _, f in store.entries(OUT)]
    assert len(keys) == len(set(keys))
    assert store.pending_count(IN, "alerter-service") == 0
    engine = replay(rec, Config()).engine
    live = load(store.get(CKPT) or b"").engine
    assert engine is not None and live.nodes.ids == engine.nodes.ids and live.graph.n_edges == engine.graph.n_edges
    assert np.array_equal(live.baseline.state.level, engine.baseline.state.level)


@pytest.mark.skipif(not DEMO_RECORDING.exists(), reason="demo recording not generated yet")
def test_demo_week_replay_and_live_agree(store: Store) -> None:  # noqa: F811
    config = Config()
    push_recording(DEMO_RECORDING, store, config.live)
    summary = Service(config, store, drained=True).run(install_signals=False)
    expected = [dumps(a) for a in replay(DEMO_RECORDING, config).alerts]
    assert len(expected) > 10
    assert [dumps(a) for a in summary.alerts] == expected == outbox_lines(store)


def test_late_counts_are_kept_apart_and_never_applied(tmp_path: Path, store: Store) -> None:  # noqa: F811
    config = Config()
    rec = small_recording(tmp_path)
    push_recording(rec, store, config.live)
    Service(config, store, drained=True).run(install_signals=False)
    before = store.get(CKPT) or b""
    store.append(IN, [encode_count("/hot", START + timedelta(hours=10), 99999)])
    summary = Service(config, store, drained=True).run(install_signals=False)
    assert summary.counters["late"] == 1 and not summary.alerts
    (_, late), = store.entries(LATE)
    assert late[b"hour"] == format_hour(START + timedelta(hours=10)).encode() and late[b"orig.count"] == b"99999"
    a, b = load(before).engine.baseline.state, load(store.get(CKPT) or b"").engine.baseline.state
    assert np.array_equal(a.level, b.level) and np.array_equal(a.season, b.season)


def test_restart_with_open_hours_in_the_checkpoint(tmp_path: Path, store: Store) -> None:  # noqa: F811
    """Live mode with a fixed clock closes hours 0..99 on the scheduler's wake-up; the rest stay open
    in the checkpoint; a drained restart finishes them with the replay's alerts."""
    config = Config()
    rec = small_recording(tmp_path)
    push_recording(rec, store, config.live)
    now = START + timedelta(hours=100, seconds=config.live.grace_seconds)
    svc = Service(config, store, clock=lambda: now)
    thread = threading.Thread(target=svc.run, kwargs={"install_signals": False})
    thread.start()
    deadline = time.monotonic() + 30
    while len(svc.summary.hours) < 100 and time.monotonic() < deadline:
        time.sleep(0.02)
    _wait_applied(svc, store, deadline, acked=True)  # hours 0..99 can close before the last read
    svc.stop()
    thread.join(30)
    assert len(svc.summary.hours) == 100
    state = load(store.get(CKPT) or b"")
    assert len(state.buckets.open) == 140 and store.pending_count(IN, "alerter-service") == 0
    rest = Service(config, store, drained=True).run(install_signals=False)
    assert len(rest.hours) == 140
    assert outbox_lines(store) == [dumps(a) for a in replay(rec, config).alerts]


def _is_bad(fields: dict[bytes, bytes]) -> bool:
    try:
        decode_entry(fields)
    except BadEntryError:
        return True
    return False


_keys = st.sampled_from([b"v", b"type", b"node", b"hour", b"count", b"enc", b"nodes", b"counts", b"src", b"dst"])
_vals = st.one_of(st.binary(max_size=24), st.sampled_from(
    [b"count", b"batch", b"edge_add", b"json", b"f64", b"-5", b"abc", b"2026-11-05T07:00:00Z", b"2026-11-05T07:10:00Z",
     b"[1]", b"[\"/hot\"]", b"/hot", b""]))
bad_entries = st.dictionaries(_keys, _vals, min_size=1, max_size=6).filter(_is_bad)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                 HealthCheck.too_slow])
@given(st.lists(st.tuples(st.integers(0, 10_000), bad_entries), min_size=100, max_size=300))
def test_fuzz_malformed_entries_go_to_dead_letters(tmp_path: Path, store: Store, bad: list[tuple[int, dict]]) -> None:  # noqa: F811
    store.client.flushall()
    config = Config()
    rec = tmp_path / "fuzz.jsonl"
    if not rec.exists():
        small_recording(tmp_path, "fuzz.jsonl")
    push_recording(rec, store, config.live)
    valid = store.entries(IN)
    store.client.delete(IN)
    mixed: list[dict] = [f for _, f in valid]
    for pos, fields in sorted(bad, key=lambda b: b[0]):
        mixed.insert(pos * len(mixed) // 10_001, fields)
    store.append(IN, mixed)
    summary = Service(config, store, drained=True).run(install_signals=False)
    dead = store.entries(DEAD)
    assert len(dead) == len(bad) == summary.counters["dead"]
    assert all(f[b"reason"] for _, f in dead)
    assert outbox_lines(store) == [dumps(a) for a in replay(rec, config).alerts]


def test_sigterm_finishes_checkpoints_and_exits_zero(tmp_path: Path, store: Store, redis_url: str) -> None:  # noqa: F811
    rec = small_recording(tmp_path)
    push_recording(rec, store, Config().live)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "alerter.cli", "-v", "run", "--redis", redis_url],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, cwd=tmp_path)
    deadline = time.monotonic() + 30
    while store.length(OUT) == 0 and time.monotonic() < deadline:
        time.sleep(0.05)
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=30)
    assert proc.returncode == 0, err.decode()[-2000:]
    assert b"signal=SIGTERM" in err and b"state=stopped" in err
    # alerter run freezes its settled heap once, after the first closed hour (alerter.heap): the
    # imported modules alone are tens of thousands of objects no later full collection walks
    settled = re.findall(rb"service heap settled partition=0 frozen_objects=(\d+)", err)
    assert len(settled) == 1 and int(settled[0]) > 10_000, err.decode()[-2000:]
    assert store.pending_count(IN, "alerter-service") == 0
    assert load(store.get(CKPT) or b"").applied_id == store.entries(IN)[-1][0]
    assert b"alert " in out


def test_unreachable_redis_says_where_and_how_to_fix() -> None:
    url = f"redis://127.0.0.1:{free_port()}/0"
    with pytest.raises(StoreUnavailableError) as info:
        connect(LiveSettings(), url)
    assert "127.0.0.1" in str(info.value) and "--redis" in str(info.value)


def test_retry_with_backoff_survives_a_server_restart(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    server = LocalServer(tmp_path / "r")
    url = server.start()
    st_ = connect(LiveSettings(), url)
    st_.append("s", [{"a": "1"}])
    port = server.port
    server.stop()
    restarter = threading.Timer(1.0, lambda: server.start(port=port))
    restarter.start()
    try:
        with caplog.at_level(logging.WARNING):
            n = with_retry(lambda: st_.length("s"), 0.1, 0.4, "XLEN")
        assert n == 1  # the append-only file kept the entry
        assert "redis unavailable op=XLEN attempt=1" in caplog.text
    finally:
        restarter.join()
        st_.close()
        server.stop()


def test_password_never_reaches_messages_or_logs(redis_url: str, caplog: pytest.LogCaptureFixture) -> None:  # noqa: F811
    secret_url = redis_url.replace("redis://", "redis://app:s3cret-pw@")
    with caplog.at_level(logging.DEBUG), pytest.raises(StoreUnavailableError) as info:
        connect(LiveSettings(), secret_url)
    assert "s3cret-pw" not in str(info.value) and "s3cret-pw" not in caplog.text
    assert "app:***@" in str(info.value)


def test_embedded_server_starts_is_shared_and_persists(tmp_path: Path) -> None:
    first = EmbeddedServer(tmp_path / "redis")
    url = first.ensure()
    try:
        a = connect(LiveSettings(redis_url=url))
        a.append("s", [{"a": "1"}])
        second = EmbeddedServer(tmp_path / "redis")
        assert second.ensure() == url and not second.started and first.started
        a.close()
    finally:
        first.stop()
    assert list((tmp_path / "redis").rglob("*.aof*"))
    again = EmbeddedServer(tmp_path / "redis")
    again.ensure()
    try:
        b = connect(LiveSettings(redis_url=again.url))
        assert b.length("s") == 1
        b.close()
    finally:
        again.stop()


TWO_WORKERS_YAML = """\
live:
  partitions: 2
incidents:
  capacity:
    - match: ["/*/a*"]
      visits_per_hour: 200
"""


@pytest.mark.skipif(not DEMO_RECORDING.exists(), reason="demo recording not generated yet")
def test_two_workers_on_the_demo_week_give_the_records_of_one(tmp_path: Path, store: Store, redis_url: str) -> None:  # noqa: F811
    """The demo week on two partitions, two worker processes: the union of the outboxes' alert
    records, the leader's incident updates and spill-over warnings equal one worker's exactly
    (byte-equal JSON records, no tolerance), with thousands of links crossing partitions.

    Spill-over warnings are switched on (articles over 200 visits an hour) so that the
    leader's merged spill check runs too.
    """
    cfg_file = tmp_path / "two.yaml"
    cfg_file.write_text(TWO_WORKERS_YAML)
    config = load_config(cfg_file)
    one = replay(DEMO_RECORDING, config)
    # links crossing partitions, and alerts explained by a neighbour of the other partition
    links = {(e.src, e.dst) for e in read_recording(DEMO_RECORDING) if isinstance(e, EdgeEvent) and e.op == "add"}
    crossing = [(s, d) for s, d in links if partition_of(s, 2) != partition_of(d, 2)]
    assert len(crossing) > 1000 and len(crossing) < len(links)
    blamed = [a for a in one.alerts if any(partition_of(u.node, 2) != partition_of(a.node, 2) for u in a.upstream)]
    assert len(blamed) >= 5
    assert any(partition_of(w.node, 2) != partition_of(w.via, 2) for w in one.spills)
    mixed = [u for u in one.incidents if len({partition_of(m, 2) for m in u.members}) == 2]
    assert mixed, "some incidents must group alerts of both partitions"

    assert main(["push", str(DEMO_RECORDING), "--redis", redis_url, "--config", str(cfg_file), "--json"]) == 0
    run_workers(redis_url, cfg_file)
    alerts = [outbox_of(store, p, b"alert", b"alert") for p in (0, 1)]
    assert alerts[0] and alerts[1]  # both workers alert on their own nodes
    assert sorted(alerts[0] + alerts[1]) == sorted(dumps(a) for a in one.alerts)
    assert all(partition_of(json.loads(line)["node"], 2) == p for p in (0, 1) for line in alerts[p])
    assert outbox_of(store, 0, b"incident", b"incident") == [dumps(u) for u in one.incidents]
    assert outbox_of(store, 0, b"spill", b"spill") == [dumps(w) for w in one.spills]
    assert not outbox_of(store, 1, b"incident", b"incident") and not outbox_of(store, 1, b"spill", b"spill")


def _add_while_another_reads(st_: Store, fields: list[dict], consumer: str, count: int) -> list:
    """One MULTI/EXEC: XADD the first ``count`` entries, ``consumer`` of the group reads them, XADD
    the rest. A service blocked in XREADGROUP is served only after EXEC, so the other consumer
    gets exactly those entries, whatever the timing."""
    pipe = st_.client.pipeline(transaction=True)
    for f in fields[:count]:
        pipe.xadd(IN, f)
    pipe.xreadgroup("alerter-service", consumer, {IN: ">"}, count=count)
    for f in fields[count:]:
        pipe.xadd(IN, f)
    return list(pipe.execute()[count][0][1])


def _wait_applied(svc: Service, st_: Store, deadline: float, acked: bool = False) -> None:
    """Until the service has applied the stream's last entry and, with ``acked``, acknowledged all
    it read: the applied id moves at ingest, the XACK only follows the next checkpoint commit."""
    def done() -> bool:
        return svc.state.applied_id == st_.entries(IN)[-1][0] and (
            not acked or st_.pending_count(IN, "alerter-service") == 0)
    while not done() and time.monotonic() < deadline:
        time.sleep(0.02)


def test_running_service_claims_what_dead_consumers_left(tmp_path: Path, store: Store,  # noqa: F811
                                                         caplog: pytest.LogCaptureFixture) -> None:
    """While a service runs, a second consumer of the group reads 20 entries in the middle of
    the stream and dies without acknowledging them: the running service reads on past them,
    holds what it read (stream order: edges and the applied-id skip rule depend on it) and
    claims them once idle ``live.claim_idle_seconds``. Then a third one takes the stream's
    last 5 entries and dies: the service, idle, finds them at its periodic claim. It ends
    with the replay's alerts: none lost, none doubled, nothing left pending."""
    config = Config()
    config = config.model_copy(update={"live": config.live.model_copy(update={"claim_idle_seconds": 1.0})})
    rec = small_recording(tmp_path)
    push_recording(rec, store, config.live)
    fields = [f for _, f in store.entries(IN)]
    store.client.delete(IN)
    first = len(fields) // 2
    store.append(IN, fields[:first])
    now = START + timedelta(hours=300)  # every hour is due as soon as its counts are in
    svc = Service(config, store, clock=lambda: now)
    thread = threading.Thread(target=svc.run, kwargs={"install_signals": False}, daemon=True)
    with caplog.at_level(logging.INFO, logger="alerter.service"):
        thread.start()
        try:
            deadline = time.monotonic() + 120
            _wait_applied(svc, store, deadline, acked=True)
            assert svc.phase.value == "running" and store.pending_count(IN, "alerter-service") == 0
            assert len(_add_while_another_reads(store, fields[first:-5], "dead", 20)) == 20
            assert store.pending_count(IN, "alerter-service") >= 20
            _wait_applied(svc, store, deadline)
            assert len(_add_while_another_reads(store, fields[-5:], "dead2", 5)) == 5
            while len(svc.summary.hours) < 240 and time.monotonic() < deadline:
                time.sleep(0.05)
        finally:
            svc.stop()
            thread.join(30)
    assert outbox_lines(store) == [dumps(a) for a in replay(rec, config).alerts]
    keys = [f[b"key"] for _, f in store.entries(OUT)]
    assert len(keys) == len(set(keys)) and len(svc.summary.hours) == 240
    assert store.pending_count(IN, "alerter-service") == 0 and store.foreign_pending(IN, "alerter-service", "x") == []
    assert svc.state.counters["claimed"] == 25 and svc.state.counters.get("late", 0) == 0
    assert "for entries held by consumer=dead " in caplog.text  # the service held back what it read past them
    for n in (20, 5):  # no read returns the last 5: only the periodic claim brings them
        assert f"claimed partition=0 entries={n} idle_s=1 phase=running" in caplog.text
