"""``alerter sinks test`` and ``alerter outbox`` against a real Redis and a real local HTTP server."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from alerter.cli import main
from alerter.config import load_config
from alerter.delivery import SinkWorker
from alerter.store import Store

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures
from .test_sinks_http import H1, Hook, alert, hook, push_hour, update  # noqa: F401 - fixtures

TARGETS = """sinks:
  targets:
    - {name: chat, kind: webhook, url_env: TEST_HOOK_URL}
    - {name: files, kind: jsonl, path: "%s"}
    - {name: dash, kind: redis_stream, stream: "alerter:rendered"}
    - {name: broken, kind: webhook, url_env: TEST_UNSET_URL}
"""


def _config_file(tmp_path: Path) -> Path:
    path = tmp_path / "sinks.yaml"
    path.write_text(TARGETS % (tmp_path / "out.jsonl"))
    return path


def test_sinks_test_posts_a_sample_to_every_sink_and_reports_each_answer(
        store: Store, hook: Hook, redis_url: str, tmp_path: Path,  # noqa: F811
        monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    monkeypatch.delenv("TEST_UNSET_URL", raising=False)
    cfg = _config_file(tmp_path)
    assert main(["sinks", "test", "--config", str(cfg), "--redis", redis_url, "--json"]) == 1  # one sink failed
    got = json.loads(capsys.readouterr().out)
    assert got["chat"] == {"ok": True, "status": 200, "answer": "ok"}
    assert got["files"]["ok"] and got["files"]["answer"] == str(tmp_path / "out.jsonl")
    assert got["dash"]["ok"] and store.length("alerter:rendered") == 1
    assert not got["broken"]["ok"] and "TEST_UNSET_URL is not set" in got["broken"]["error"]
    (post,) = hook.posts
    assert post["body"]["text"].startswith("(test message) [SURGE NEW] incident test-incident")
    assert post["headers"]["idempotency-key"].startswith("test|")
    (line,) = (tmp_path / "out.jsonl").read_text().splitlines()
    assert json.loads(line)["key"] == post["headers"]["idempotency-key"]  # one sample, the same key everywhere

    monkeypatch.setenv("TEST_UNSET_URL", hook.url)
    assert main(["sinks", "test", "--config", str(cfg), "--redis", redis_url]) == 0
    out = capsys.readouterr().out
    assert out.count(": ok status=") == 4 and "FAILED" not in out


def test_outbox_lists_entries_with_their_state_per_sink(store: Store, hook: Hook, redis_url: str,  # noqa: F811
                                                        tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    cfg_path = _config_file(tmp_path)
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",)), update("inc-2", 1, H1, ("/b",))])
    push_hour(store, [], [update("inc-3", 1, H1, ("/c",))])
    hook.script = [(200, {}), (400, {})]  # inc-1 accepted, inc-2 rejected (not retried)
    config = load_config(str(cfg_path))
    chat = config.sinks.targets[0]
    worker = SinkWorker(config, chat, store, sleep=lambda s: None)
    for eid, fields in store.read_group("alerter:{p0}:outbox", "alerter-sink-chat", "deliver", ">", 3, None):
        worker.handle(eid, fields)  # inc-3 is left unread by chat
    store.ensure_group("alerter:{p0}:outbox", "alerter-sink-dash")
    store.read_group("alerter:{p0}:outbox", "alerter-sink-dash", "deliver", ">", 1, None)  # read, never acked

    assert main(["outbox", "--config", str(cfg_path), "--redis", redis_url, "--limit", "10", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["key"] for r in rows] == ["/a|2026-11-20T10:00:00Z|surge", "incident|inc-1|1", "incident|inc-2|1",
                                        "incident|inc-3|1"]  # oldest first
    assert [r["sinks"]["chat"] for r in rows] == ["acked", "delivered", "dead", "unread"]
    assert [r["sinks"]["dash"] for r in rows] == ["pending", "unread", "unread", "unread"]
    assert {r["sinks"]["files"] for r in rows} == {"unread"}  # its group does not exist yet

    assert main(["outbox", "--config", str(cfg_path), "--redis", redis_url, "--limit", "2"]) == 0
    text = capsys.readouterr().out.splitlines()
    assert text[0] == "2 recent entries of alerter:{p0}:outbox"
    assert "incident|inc-3|1" in text[2] and "chat=unread" in text[2] and "dash=unread" in text[2]
