"""`alerter sinks run` under a Redis restart: the delivery thread waits with the backoff in
``live.retry``, starts again from its pending entries, and every chat message reaches the
real local webhook exactly once. An error that is not an outage stops every sink's thread
and reaches the caller, instead of leaving one sink silently dead."""

from __future__ import annotations

import logging
import threading
import time
from pathlib import Path

import pytest

from alerter.config import Config, LiveRetry, LiveSettings, SinkSettings, SinkTarget
from alerter.delivery_threads import run_delivery
from alerter.errors import SinkError
from alerter.redis_server import LocalServer
from alerter.store import connect

from .test_sinks_http import H1, H2, OUT, Hook, alert, hook, push_hour, update  # noqa: F401 - fixture


def _config() -> Config:
    return Config(live=LiveSettings(retry=LiveRetry(initial_seconds=0.2, max_seconds=0.5)),
                  sinks=SinkSettings(targets=[SinkTarget(name="chat", kind="webhook", url_env="TEST_HOOK_URL")]))


def _until(check: object, timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():  # type: ignore[operator]
            return
        time.sleep(0.05)
    raise AssertionError(f"{what} did not happen within {timeout:.0f} s")


def test_a_redis_restart_under_delivery_loses_and_doubles_nothing(tmp_path: Path, hook: Hook,  # noqa: F811
                                                                   monkeypatch: pytest.MonkeyPatch,
                                                                   caplog: pytest.LogCaptureFixture) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    server = LocalServer(tmp_path / "redis")
    url, port = server.start(), server.port
    st = connect(LiveSettings(), url)
    cfg = _config()
    push_hour(st, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",))])
    stop, done = threading.Event(), {}
    runner = threading.Thread(target=lambda: done.update(workers=run_delivery(cfg, st, stop=stop)))
    try:
        with caplog.at_level(logging.WARNING):
            runner.start()
            _until(lambda: len(hook.posts) == 1, 20, "the first message")
            server.stop()  # the worker is waiting in XREADGROUP: its connection goes
            time.sleep(1.5)
            server.start(port=port)  # same port, same append-only file: the delivered set is back
            push_hour(st, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a",), "growing")])
            _until(lambda: len(hook.posts) == 2, 30, "the message written after the restart")
            time.sleep(1.0)  # room for a double post to show
            stop.set()
            runner.join(timeout=30)
    finally:
        stop.set()
        server.stop()
    assert not runner.is_alive()
    keys = [p["headers"]["idempotency-key"] for p in hook.posts]
    assert keys == ["incident|inc-1|1", "incident|inc-1|2"]
    outages = [r.message for r in caplog.records if "redis unavailable op=deliver sink=chat partition=0" in r.message]
    assert outages, "the worker never met the outage"
    (worker,) = done["workers"]
    assert worker.counters["delivered"] == 2


def test_an_error_that_is_not_an_outage_stops_delivery_and_is_raised(tmp_path: Path, hook: Hook,  # noqa: F811
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """A worker whose sink raises something unexpected: run_delivery re-raises it after every
    thread has stopped (before, the thread died alone and the process ran on)."""
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    server = LocalServer(tmp_path / "redis")
    st = connect(LiveSettings(), server.start())
    cfg = _config()
    push_hour(st, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",))])
    from alerter import delivery

    def broken(self: delivery.SinkWorker, eid: bytes, fields: dict[bytes, bytes]) -> None:
        raise SinkError("a bug in a sink")

    monkeypatch.setattr(delivery.SinkWorker, "handle", broken)
    try:
        with pytest.raises(SinkError, match="a bug in a sink"):
            run_delivery(cfg, st)  # not drained: without the re-raise this would run on for ever
        assert st.pending_count(OUT, "alerter-sink-chat") == 2 and not hook.posts  # the read batch waits for a restart
    finally:
        server.stop()
