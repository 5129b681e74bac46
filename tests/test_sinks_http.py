"""Webhook sink against a real local HTTP server and a real Redis: retries, 429, idempotency, crash."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest

from alerter.config import Config, SinkSettings, SinkTarget
from alerter.delivery import SinkWorker, sink_keys
from alerter.incidents import IncidentUpdate
from alerter.records import Alert, SpillWarning, Upstream, dumps
from alerter.store import Store

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures

OUT = "alerter:{p0}:outbox"
ROOT = Path(__file__).resolve().parent.parent


@dataclass
class Hook:
    """A local HTTP endpoint: answers from ``script`` first (status, headers), then 200."""

    url: str = ""
    script: list[tuple[int, dict[str, str]]] = field(default_factory=list)
    posts: list[dict] = field(default_factory=list)
    received: threading.Event = field(default_factory=threading.Event)
    hold: threading.Event | None = None  # when set: wait for it before answering (crash tests)
    lock: threading.Lock = field(default_factory=threading.Lock)
    reply: Callable[[dict], bytes] | None = None  # body of a 2xx answer from the request (default b"ok")


@pytest.fixture
def hook() -> Iterator[Hook]:
    state = Hook()

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802 - http.server naming
            body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
            with state.lock:
                post = {"headers": {k.lower(): v for k, v in self.headers.items()}, "body": json.loads(body),
                        "path": self.path, "method": self.command}
                state.posts.append(post)
                status, headers = state.script.pop(0) if state.script else (200, {})
                answer = state.reply(post) if state.reply is not None and status < 300 else b"ok"
            state.received.set()
            if state.hold is not None:
                state.hold.wait(30)
            self.send_response(status)
            for k, v in headers.items():
                self.send_header(k, v)
            self.send_header("Content-Length", str(len(answer)))
            self.end_headers()
            try:
                self.wfile.write(answer)
            except BrokenPipeError:  # the crash test killed the client while we held the answer
                pass

        do_PATCH = do_PUT = do_POST  # noqa: N815 - edits of a message (``updates.method``)

        def log_message(self, *args: object) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    state.url = f"http://127.0.0.1:{server.server_address[1]}/hook/SECRET-TOKEN"
    yield state
    if state.hold is not None:
        state.hold.set()
    server.shutdown()
    server.server_close()


def alert(node: str, hour: str, excess: float = 900.0) -> Alert:
    return Alert.build(node=node, hour=hour, kind="surge", observed=100 + excess, expected=100, band_low=60,
                       band_high=150, score=8, rule="default", streak=1,
                       upstream=(Upstream("/home", excess * 0.6, 0.6, "new"),), unexplained=excess * 0.4,
                       origin="mixed")


def update(inc: str, rev: int, hour: str, members: tuple[str, ...], state: str = "open",
           excess: float = 900.0) -> IncidentUpdate:
    return IncidentUpdate(incident=inc, revision=rev, hour=hour, state=state, direction="surge", root=members[0],
                          start="2026-11-20T10:00:00Z", members=members, new_members=members if rev == 1 else (),
                          total_excess=excess)


def push_hour(st: Store, alerts: list[Alert], updates: list[IncidentUpdate], spills: Sequence[SpillWarning] = (),
              hour: str | None = None, suppressed: dict[str, int] | None = None) -> None:
    """Write entries the way the service does (``Service._close``): the hour's alerts, its
    spill-over warnings, its incident updates, then the cooldown figures of the hour."""
    rows: list[dict[str, str]] = []
    for a in alerts:
        rows.append({"type": "alert", "key": f"{a.node}|{a.hour}|{a.kind}", "node": a.node, "hour": a.hour,
                     "kind": a.kind, "alert": dumps(a)})
    for w in spills:
        rows.append({"type": "spill", "key": f"spill|{w.incident}|{w.node}|{w.hour}", "hour": str(hour),
                     "spill": dumps(w)})
    for u in updates:
        rows.append({"type": "incident", "key": f"incident|{u.incident}|{u.revision}", "hour": u.hour,
                     "incident": dumps(u)})
    if suppressed:
        rows.append({"type": "suppressed", "key": f"suppressed|{hour}", "hour": str(hour), "reason": "cooldown",
                     **{k: str(v) for k, v in suppressed.items()}})
    st.append(OUT, rows)


def config_with(**target: object) -> Config:
    base = {"name": "chat", "kind": "webhook", "url_env": "TEST_HOOK_URL"}
    return Config(sinks=SinkSettings(targets=[SinkTarget(**{**base, **target})]))


H1, H2 = "2026-11-20T10:00:00Z", "2026-11-20T11:00:00Z"


def test_retries_then_429_then_accepts_exactly_once_in_order(store: Store, hook: Hook,  # noqa: F811
                                                             monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    hook.script = [(500, {}), (502, {}), (429, {"Retry-After": "7"})]
    push_hour(store, [alert("/a", H1), alert("/b", H1)], [update("inc-1", 1, H1, ("/a", "/b"))])
    push_hour(store, [alert("/a", H2), alert("/c", H2)],
              [update("inc-1", 2, H2, ("/a", "/b", "/c"), "growing"), update("inc-2", 1, H2, ("/z",))])
    push_hour(store, [], [update("inc-1", 3, "2026-11-20T14:00:00Z", ("/a", "/b", "/c"), "closed")])
    waits: list[float] = []
    cfg = config_with()
    worker = SinkWorker(cfg, cfg.sinks.targets[0], store, sleep=waits.append, rand=lambda: 0.5)
    counters = worker.run(drained=True)

    keys = [p["headers"]["idempotency-key"] for p in hook.posts]
    assert keys[:4] == ["incident|inc-1|1"] * 4  # 500, 502, 429, then 200: the same key on every retry
    accepted = keys[3:]
    assert accepted == ["incident|inc-1|1", "incident|inc-1|2", "incident|inc-2|1", "incident|inc-1|3"]
    assert waits == [1.0, 2.0, 7.0]  # backoff 1 s, 2 s, then the 429's Retry-After (longer than 4 s)
    assert counters["delivered"] == 4 and counters["joined"] == 4 and counters["retries"] == 3
    assert store.pending_count(OUT, "alerter-sink-chat") == 0
    first = hook.posts[3]["body"]["text"]
    assert "/a" in first and "/b" in first and "estimate" in first and "not proof of cause" in first
    assert "+900%" in first and "via /home" in first
    assert hook.posts[4]["headers"]["x-alerter-thread"] == "inc-1"
    assert "update 2 to the first message" in hook.posts[4]["body"]["text"]
    assert "CLOSED" in hook.posts[6]["body"]["text"]

    worker2 = SinkWorker(cfg, cfg.sinks.targets[0], store, sleep=waits.append)  # same entries again
    store.client.xgroup_setid(OUT, "alerter-sink-chat", "0")
    assert worker2.run(drained=True).get("already_delivered") == 4
    assert len(hook.posts) == 7  # the delivered-set kept every message single


def test_gives_up_into_dead_letters_with_last_error(store: Store, hook: Hook,  # noqa: F811
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    hook.script = [(503, {})] * 6 + [(400, {})]
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",)), update("inc-9", 1, H1, ("/q",))])
    cfg = config_with()
    worker = SinkWorker(cfg, cfg.sinks.targets[0], store, sleep=lambda s: None)
    counters = worker.run(drained=True)
    assert counters["dead"] == 2 and len(hook.posts) == 7  # 6 attempts, then a 400 is not retried
    dead = [f for _, f in store.entries(sink_keys(cfg, "chat").dead)]
    assert b"503" in dead[0][b"error"] and b"attempt 6 of 6" in dead[0][b"error"]
    assert b"400" in dead[1][b"error"] and b"attempt 1 of 6" in dead[1][b"error"]
    assert all(b"SECRET-TOKEN" not in f[b"error"] for f in dead)  # the URL's secret path is redacted
    assert store.pending_count(OUT, "alerter-sink-chat") == 0


def test_missing_url_variable_names_the_variable(store: Store, monkeypatch: pytest.MonkeyPatch) -> None:  # noqa: F811
    monkeypatch.delenv("TEST_HOOK_URL", raising=False)
    push_hour(store, [], [update("inc-1", 1, H1, ("/a",))])
    cfg = config_with()
    SinkWorker(cfg, cfg.sinks.targets[0], store, sleep=lambda s: None).run(drained=True)
    (entry,) = [f for _, f in store.entries(sink_keys(cfg, "chat").dead)]
    assert b"TEST_HOOK_URL is not set" in entry[b"error"]


def _cli(cfg_path: Path, redis_url: str, hook_url: str) -> subprocess.Popen[bytes]:  # noqa: F811
    env = {**os.environ, "TEST_HOOK_URL": hook_url, "PYTHONPATH": str(ROOT), "PYTHONFAULTHANDLER": "1"}
    return subprocess.Popen([sys.executable, "-m", "alerter.cli", "sinks", "run", "--until-drained",
                             "--config", str(cfg_path), "--redis", redis_url, "--json"],
                            cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def kill_after_first_post(cfg_path: Path, redis_url: str, hook: Hook) -> None:  # noqa: F811
    """Start ``sinks run`` and SIGKILL it once the server has its first post, before it answers
    (the server holds the answer back, so the client cannot have seen a 2xx)."""
    hook.hold = threading.Event()
    proc = _cli(cfg_path, redis_url, hook.url)
    try:
        assert hook.received.wait(30), proc.stderr.read().decode() if proc.poll() is not None else "no post"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
    hook.hold.set()
    hook.hold = None


def run_to_end(cfg_path: Path, redis_url: str, hook: Hook) -> str:  # noqa: F811
    """Run ``sinks run --until-drained`` again (the restart); its JSON counters, stack dump on a hang."""
    again = _cli(cfg_path, redis_url, hook.url)
    try:
        out, err = again.communicate(timeout=60)
    except subprocess.TimeoutExpired:
        again.send_signal(signal.SIGABRT)  # PYTHONFAULTHANDLER prints every thread's stack
        out, err = again.communicate(timeout=10)
        raise AssertionError(err.decode()[-3000:]) from None
    assert again.returncode == 0, err.decode()[-3000:]
    return out.decode()


def test_sigkill_after_the_server_received_the_post_never_doubles(store: Store, hook: Hook,  # noqa: F811
                                                                  redis_url: str, tmp_path: Path) -> None:  # noqa: F811
    cfg_path = tmp_path / "sinks.yaml"
    cfg_path.write_text("sinks:\n  targets:\n    - {name: chat, kind: webhook, url_env: TEST_HOOK_URL}\n")
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",)), update("inc-2", 1, H1, ("/b",))])
    kill_after_first_post(cfg_path, redis_url, hook)
    assert len(hook.posts) == 1
    assert store.pending_count(OUT, "alerter-sink-chat") >= 1  # killed before XACK

    out = run_to_end(cfg_path, redis_url, hook)
    keys = [p["headers"]["idempotency-key"] for p in hook.posts]
    assert keys == ["incident|inc-1|1", "incident|inc-2|1"]  # inc-1 not posted again, inc-2 once
    counters = json.loads(out)["chat/p0"]
    assert counters["uncertain"] == 1 and counters["delivered"] == 1
    (dead,) = [f for _, f in store.entries(sink_keys(Config(), "chat").dead)]
    assert dead[b"key"] == b"incident|inc-1|1" and b"uncertain" in dead[b"error"]
    assert store.pending_count(OUT, "alerter-sink-chat") == 0
