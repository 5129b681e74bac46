"""Delivery paths of incident updates against a real Redis and a real local HTTP server.

Edits in place of the first message (``updates:``), spill-over warnings joined to their
incident's update or sent as one follow-up, the digest's cooldown figures, the two
``uncertain`` policies after a crash, and JSON Lines rotation by day on an injected clock.
The HTTP semantics checked (a PATCH/PUT to the message's own URL edits it; a 2xx answer
body carries the new resource's id) follow RFC 9110 sections 9.3.4 and 15.3 and RFC 5789
(PATCH); the ``Idempotency-Key`` header follows the IETF httpapi draft
"The Idempotency-Key HTTP Header Field" (same key on every retry of one operation).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from alerter.config import Config, DigestSettings, SinkSettings, SinkTarget, SinkUpdates
from alerter.delivery import SinkWorker, sink_keys, stats_bucket
from alerter.digest import post_digest, summarise
from alerter.records import SpillWarning
from alerter.sinks import JsonlSink, build_sink
from alerter.store import Store

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures
from .test_sinks_http import (
    H1,
    H2,
    OUT,
    Hook,
    alert,
    hook,  # noqa: F401 - fixture
    kill_after_first_post,
    push_hour,
    run_to_end,
    update,
)

H3, H4 = "2026-11-20T12:00:00Z", "2026-11-20T13:00:00Z"
EDITS = SinkUpdates(id_field="message.id", url_template="$url/messages/$message_id", method="PATCH")


def _ids_reply(prefix: str = "m") -> Callable[[dict], bytes]:
    """An endpoint that answers a new post with ``{"message": {"id": ...}}`` and an edit with ``{}``."""
    counter = iter(range(1, 10_000))

    def reply(post: dict) -> bytes:
        if post["method"] != "POST":
            return b"{}"
        return json.dumps({"message": {"id": f"{prefix}/{next(counter)} x"}}).encode()
    return reply


def _worker(cfg: Config, st: Store, **kw: object) -> SinkWorker:
    return SinkWorker(cfg, cfg.sinks.targets[0], st, sleep=lambda s: None, rand=lambda: 0.5, **kw)  # type: ignore[arg-type]


def _config(**target: object) -> Config:
    base = {"name": "chat", "kind": "webhook", "url_env": "TEST_HOOK_URL"}
    return Config(sinks=SinkSettings(targets=[SinkTarget(**{**base, **target})]))


def _sent(server: Hook) -> list[tuple[str, str, str]]:
    return [(p["method"], p["path"], p["headers"]["idempotency-key"]) for p in server.posts]


# --- edits in place ------------------------------------------------------------------------------

def test_updates_edit_the_first_message_with_their_own_key_and_survive_a_restart(
        store: Store, hook: Hook, monkeypatch: pytest.MonkeyPatch) -> None:  # noqa: F811
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    hook.reply = _ids_reply()
    push_hour(store, [alert("/a", H1), alert("/z", H1)], [update("inc-1", 1, H1, ("/a",)), update("inc-2", 1, H1, ("/z",))])
    push_hour(store, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a", "/b"), "growing")])
    hook.script = [(200, {}), (200, {}), (500, {}), (503, {})]  # the first edit fails twice, then goes through
    cfg = _config(updates=EDITS)
    counters = _worker(cfg, store).run(drained=True)
    base = "/hook/SECRET-TOKEN"
    assert _sent(hook) == [("POST", base, "incident|inc-1|1"), ("POST", base, "incident|inc-2|1")] + \
        [("PATCH", base + "/messages/m%2F1%20x", "incident|inc-1|2")] * 3  # same key on every retry
    assert counters["delivered"] == 3 and counters["retries"] == 2
    assert "update 2 to the first message" in hook.posts[-1]["body"]["text"]
    ids = sink_keys(cfg, "chat").message_ids
    assert store.hash_all(ids) == {b"inc-1": b"m/1 x", b"inc-2": b"m/2 x"}  # edits never overwrite an id

    # a restart: a new worker has nothing in memory and reads the kept ids back from Redis
    push_hour(store, [], [update("inc-1", 3, H3, ("/a", "/b"), "closed"), update("inc-2", 2, H3, ("/z",), "closed")])
    again = _worker(cfg, store).run(drained=True)
    assert _sent(hook)[-2:] == [("PATCH", base + "/messages/m%2F1%20x", "incident|inc-1|3"),
                                ("PATCH", base + "/messages/m%2F2%20x", "incident|inc-2|2")]
    assert again["delivered"] == 2 and "CLOSED" in hook.posts[-1]["body"]["text"]
    assert store.hash_all(ids) == {}  # closing messages drop the kept ids: the hash holds open incidents only


def test_updates_body_template_may_name_the_message_id(store: Store, hook: Hook,  # noqa: F811
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    hook.reply = _ids_reply("t")
    edits = SinkUpdates(id_field="message.id", url_template="$url", method="POST",
                        body_template='{"text": $text, "reply_to": $message_id}')
    push_hour(store, [], [update("inc-1", 1, H1, ("/a",))])
    push_hour(store, [], [update("inc-1", 2, H2, ("/a",), "subsiding")])
    _worker(_config(updates=edits), store).run(drained=True)
    first, reply = hook.posts
    assert "reply_to" not in first["body"]
    assert reply["method"] == "POST" and reply["path"] == "/hook/SECRET-TOKEN" and reply["body"]["reply_to"] == "t/1 x"
    assert "SUBSIDING" in reply["body"]["text"]


def test_endpoint_without_an_id_gets_short_follow_ups(store: Store, hook: Hook,  # noqa: F811
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)  # the hook answers "ok": not JSON, no id
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",))])
    push_hour(store, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a",), "growing")])
    cfg = _config(updates=EDITS)
    assert _worker(cfg, store).run(drained=True)["delivered"] == 2
    assert _sent(hook) == [("POST", "/hook/SECRET-TOKEN", "incident|inc-1|1"),
                           ("POST", "/hook/SECRET-TOKEN", "incident|inc-1|2")]
    assert "update 2 to the first message" in hook.posts[1]["body"]["text"]
    assert store.hash_all(sink_keys(cfg, "chat").message_ids) == {}


# --- spill-over warnings -----------------------------------------------------------------------

def _spill(node: str, incident: str = "inc-1", via: str = "/a", forecast: float = 5100) -> SpillWarning:
    return SpillWarning(node, H3, forecast, 4000, incident, via)


def test_spill_joins_the_incident_update_of_its_hour(store: Store, hook: Hook,  # noqa: F811
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",))])
    push_hour(store, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a", "/b"), "growing")],
              spills=[_spill("/checkout"), _spill("/cart", forecast=4400)], hour=H2)
    cfg = Config(sinks=SinkSettings(read_count=1, targets=[SinkTarget(name="chat", kind="webhook",
                                                                      url_env="TEST_HOOK_URL")]))
    counters = _worker(cfg, store).run(drained=True)  # read_count 1: the read-ahead pages entry by entry
    assert _sent(hook)[1][2] == "incident|inc-1|2" and len(hook.posts) == 2  # no follow-up of its own
    text = hook.posts[1]["body"]["text"]
    assert "spill-over: /checkout forecast 5.1k/h" in text and "spill-over: /cart forecast 4.4k/h" in text
    assert "spill-over" not in hook.posts[0]["body"]["text"]
    assert counters["joined"] == 4  # two alerts and two spills, acknowledged into the updates


def test_spill_after_a_restart_still_joins_its_update(store: Store, hook: Hook,  # noqa: F811
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    push_hour(store, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a",), "growing")],
              spills=[_spill("/checkout")], hour=H2)
    cfg = _config()
    worker = _worker(cfg, store)
    got = store.read_group(OUT, "alerter-sink-chat", "deliver", ">", 2, None)  # the alert and the spill
    for eid, fields in got:
        worker.handle(eid, fields)
    assert not hook.posts
    _worker(cfg, store).run(drained=True)  # restarted: the update finds the spill in the outbox
    (post,) = hook.posts
    assert "spill-over: /checkout" in post["body"]["text"]


def test_spills_without_an_update_go_out_once_per_incident_and_hour(store: Store, hook: Hook,  # noqa: F811
                                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    spills = [_spill("/checkout"), _spill("/cart"), _spill("/pay", "inc-2", "/z"), _spill("/basket")]
    push_hour(store, [], [update("inc-1", 1, H2, ("/a",))])
    push_hour(store, [], [], spills=spills, hour=H3)
    push_hour(store, [], [], spills=[_spill("/checkout", forecast=6000)], hour=H4)  # next hour: its own note
    cfg = _config()
    counters = _worker(cfg, store).run(drained=True)
    notes = [p for p in hook.posts if p["headers"]["idempotency-key"].startswith("spill|")]
    assert [p["headers"]["idempotency-key"] for p in notes] == [f"spill|inc-1|{H3}", f"spill|inc-2|{H3}",
                                                                f"spill|inc-1|{H4}"]
    first = notes[0]["body"]["text"]
    assert "[SPILL-OVER] incident inc-1: 3 downstream nodes" in first
    assert all(f"spill-over: {n} " in first for n in ("/basket", "/cart", "/checkout")) and "/pay" not in first
    assert "1 downstream node forecast" in notes[1]["body"]["text"]
    assert counters["already_delivered"] == 2  # inc-1's other two entries of the hour found the note sent
    store.client.xgroup_setid(OUT, "alerter-sink-chat", "0")  # a restart that reads everything again
    assert _worker(cfg, store).run(drained=True)["already_delivered"] == 1 + len(spills) + 1
    assert len(hook.posts) == 4


# --- the digest's cooldown figures -------------------------------------------------------------

def test_summarise_counts_cooldown_suppressions_from_the_outbox() -> None:
    def entry(**f: str) -> tuple[bytes, dict[bytes, bytes]]:
        return b"0-1", {k.encode(): v.encode() for k, v in f.items()}
    rows = [entry(type="suppressed", reason="cooldown", surge="3", drop="2"), entry(type="suppressed", surge="1"),
            entry(type="suppressed", reason="other", surge="50"), entry(type="alert", kind="drop", alert="{}")]
    assert summarise(rows, 5).suppressed == {"cooldown": 6}
    assert summarise(rows[3:], 5).suppressed == {}


def test_digest_reports_cooldown_and_each_sinks_own_counts(store: Store, hook: Hook,  # noqa: F811
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    monkeypatch.setenv("TEST_OPS_URL", hook.url.replace("/hook/", "/ops/"))
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",))], hour=H1, suppressed={"surge": 3, "drop": 2})
    push_hour(store, [], [], hour=H2, suppressed={"surge": 4, "drop": 0})
    chat = SinkTarget(name="chat", kind="webhook", url_env="TEST_HOOK_URL")
    ops = SinkTarget(name="ops", kind="webhook", url_env="TEST_OPS_URL")
    cfg = Config(sinks=SinkSettings(targets=[chat, ops], digest=DigestSettings(enabled=True)))
    now = datetime.now(UTC)
    store.client.hincrby(sink_keys(cfg, "chat").stats.replace("@", stats_bucket(now)), "rate_limit", 7)
    # counted before the window, on the UTC day it starts (when it does not start at 00:xx): not in this digest
    since = now - timedelta(hours=24)
    early = since - timedelta(hours=min(max(since.hour, 1), 6))
    store.client.hincrby(sink_keys(cfg, "chat").stats.replace("@", stats_bucket(early)), "quiet_hours", 5)
    assert post_digest(cfg, store, now) == {"chat": "delivered", "ops": "delivered"}
    texts = {p["path"].split("/")[1]: p["body"]["text"] for p in hook.posts}
    assert "suppressed by cooldown: 9" in texts["hook"] and "suppressed by rate_limit: 7" in texts["hook"]
    assert "suppressed by cooldown: 9" in texts["ops"] and "rate_limit" not in texts["ops"]  # chat's own count
    assert "quiet_hours" not in texts["hook"]  # outside the 24 hours (per-day buckets counted it)
    assert "1 incident(s) (1 open)" in texts["hook"]


# --- uncertain after a crash ------------------------------------------------------------------

def test_uncertain_resend_posts_again_with_the_same_key(store: Store, hook: Hook,  # noqa: F811
                                                        redis_url: str, tmp_path: Path) -> None:  # noqa: F811
    cfg_path = tmp_path / "sinks.yaml"
    cfg_path.write_text("sinks:\n  targets:\n"
                        "    - {name: chat, kind: webhook, url_env: TEST_HOOK_URL, uncertain: resend}\n")
    push_hour(store, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",)), update("inc-2", 1, H1, ("/b",))])
    kill_after_first_post(cfg_path, redis_url, hook)
    inflight = sink_keys(Config(), "chat").inflight
    assert store.client.hexists(inflight, "incident|inc-1|1")  # the crash left the key in flight

    out = run_to_end(cfg_path, redis_url, hook)
    keys = [p["headers"]["idempotency-key"] for p in hook.posts]
    assert keys == ["incident|inc-1|1", "incident|inc-1|1", "incident|inc-2|1"]  # re-posted under the same key
    assert hook.posts[0]["body"] == hook.posts[1]["body"]
    counters = json.loads(out)["chat/p0"]
    assert counters["delivered"] == 2 and "uncertain" not in counters
    assert store.entries(sink_keys(Config(), "chat").dead) == []
    assert not store.client.hexists(inflight, "incident|inc-1|1")
    assert store.pending_count(OUT, "alerter-sink-chat") == 0


def test_uncertain_dead_letter_parks_without_posting(store: Store, hook: Hook,  # noqa: F811
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    """The in-process half of the crash test in test_sinks_http.py: a key marked in flight by
    an earlier run is never posted again under ``uncertain: dead_letter`` (the default)."""
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    push_hour(store, [], [update("inc-1", 1, H1, ("/a",)), update("inc-2", 1, H1, ("/b",))])
    cfg = _config()
    store.hash_set(sink_keys(cfg, "chat").inflight, "incident|inc-1|1", "1795000000.0")  # as a crash leaves it
    counters = _worker(cfg, store).run(drained=True)
    assert _sent(hook) == [("POST", "/hook/SECRET-TOKEN", "incident|inc-2|1")]
    assert counters["uncertain"] == 1 and counters["delivered"] == 1
    (dead,) = [f for _, f in store.entries(sink_keys(cfg, "chat").dead)]
    assert dead[b"key"] == b"incident|inc-1|1" and b"uncertain: resend" in dead[b"error"]


# --- JSON Lines rotation by day ----------------------------------------------------------------

class Clock:
    """A UTC datetime that moves only when told."""

    def __init__(self, at: datetime) -> None:
        self.at = at

    def __call__(self) -> datetime:
        return self.at


def _jsonl_run(st: Store, cfg: Config, clock: Clock) -> dict[str, int]:
    target = cfg.sinks.targets[0]
    return SinkWorker(cfg, target, st, sink=build_sink(target, st, now=clock),
                      clock=lambda: clock.at.timestamp()).run(drained=True)


def test_jsonl_rotates_at_the_day_of_its_clock_across_restarts(store: Store, tmp_path: Path) -> None:  # noqa: F811
    path = tmp_path / "alerts.jsonl"
    cfg = _config(kind="jsonl", path=str(path), url_env=None)
    clock = Clock(datetime(2026, 11, 20, 10, 5, tzinfo=UTC))  # not the machine's day: only the clock counts
    push_hour(store, [], [update("inc-1", 1, H1, ("/a",))])
    assert _jsonl_run(store, cfg, clock)["delivered"] == 1
    assert datetime.fromtimestamp(path.stat().st_mtime, UTC).date() == clock.at.date()

    clock.at = datetime(2026, 11, 20, 23, 59, tzinfo=UTC)  # a restart later the same day: same file
    push_hour(store, [], [update("inc-1", 2, H2, ("/a",), "growing")])
    _jsonl_run(store, cfg, clock)
    assert [f.name for f in tmp_path.iterdir()] == ["alerts.jsonl"]

    clock.at = datetime(2026, 11, 21, 0, 1, tzinfo=UTC)  # a restart the next day: the old day is rotated out
    push_hour(store, [], [update("inc-1", 3, H3, ("/a",), "closed")])
    _jsonl_run(store, cfg, clock)
    files = sorted(f.name for f in tmp_path.iterdir())
    assert files == ["alerts.jsonl", "alerts.jsonl.20261121T000100.0"]
    old = [json.loads(x)["key"] for x in (tmp_path / files[1]).read_text().splitlines()]
    new = [json.loads(x)["key"] for x in path.read_text().splitlines()]
    assert old == ["incident|inc-1|1", "incident|inc-1|2"] and new == ["incident|inc-1|3"]


@pytest.mark.parametrize(("daily", "files"), [(True, 2), (False, 1)])
def test_jsonl_daily_rotation_can_be_turned_off(tmp_path: Path, daily: bool, files: int) -> None:
    from alerter.sinks import Outgoing

    clock = Clock(datetime(2026, 11, 20, 23, 0, tzinfo=UTC))
    sink = JsonlSink("files", tmp_path / "a.jsonl", 1 << 20, daily, clock)
    sink.send(Outgoing("k1", "incident", H1, "t", "x"))
    clock.at += timedelta(hours=2)
    JsonlSink("files", tmp_path / "a.jsonl", 1 << 20, daily, clock).send(Outgoing("k2", "incident", H2, "t", "y"))
    assert len(list(tmp_path.iterdir())) == files
    lines = [json.loads(x)["key"] for f in sorted(tmp_path.iterdir()) for x in f.read_text().splitlines()]
    assert sorted(lines) == ["k1", "k2"]


def test_jsonl_days_are_utc_days_whatever_the_clocks_zone(tmp_path: Path) -> None:
    from zoneinfo import ZoneInfo

    from alerter.sinks import Outgoing

    clock = Clock(datetime(2026, 11, 20, 10, 0, tzinfo=UTC))
    JsonlSink("files", tmp_path / "a.jsonl", 1 << 20, True, clock).send(Outgoing("k1", "incident", H1, "t", "x"))
    clock.at = datetime(2026, 11, 21, 0, 30, tzinfo=ZoneInfo("Europe/Berlin"))  # 23:30 UTC, still 20 November
    JsonlSink("files", tmp_path / "a.jsonl", 1 << 20, True, clock).send(Outgoing("k2", "incident", H2, "t", "y"))
    assert [f.name for f in tmp_path.iterdir()] == ["a.jsonl"]
    clock.at = datetime(2026, 11, 21, 1, 30, tzinfo=ZoneInfo("Europe/Berlin"))  # 00:30 UTC on 21 November
    JsonlSink("files", tmp_path / "a.jsonl", 1 << 20, True, clock).send(Outgoing("k3", "incident", H3, "t", "z"))
    assert sorted(f.name for f in tmp_path.iterdir()) == ["a.jsonl", "a.jsonl.20261121T003000.0"]


class CountingStore(Store):
    """The real Store over the same real Redis, counting its read-ahead calls."""

    ahead_reads: int = 0

    def entries_after(self, stream: str, after: bytes | str, count: int) -> list:  # type: ignore[override]
        self.ahead_reads += 1
        return super().entries_after(stream, after, count)


def test_an_hour_of_many_spills_is_read_ahead_once(store: Store, hook: Hook,  # noqa: F811
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    spills = [_spill(f"/j{i:02d}") for i in range(10)] + [_spill(f"/k{i:02d}", "inc-2", "/z") for i in range(10)]
    push_hour(store, [alert("/a", H3)], [update("inc-1", 2, H3, ("/a",), "growing")], spills=spills, hour=H3)
    counting = CountingStore(store.client, store.where)
    counters = _worker(_config(), counting).run(drained=True)
    assert counting.ahead_reads == 1  # not once per spill entry
    note, update_post = hook.posts  # the note goes out at its spill entry, before the hour's updates
    assert update_post["headers"]["idempotency-key"] == "incident|inc-1|2"
    assert all(f"spill-over: /j{i:02d} " in update_post["body"]["text"] for i in range(10))
    assert note["headers"]["idempotency-key"] == f"spill|inc-2|{H3}"
    assert "10 downstream nodes" in note["body"]["text"] and "/j0" not in note["body"]["text"]
    assert counters["already_delivered"] == 9 and counters["joined"] == 11


def test_spill_notes_are_routed_like_their_incident(store: Store, hook: Hook,  # noqa: F811
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    from alerter.config import SinkRoute

    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    monkeypatch.setenv("TEST_SHOP_URL", hook.url.replace("/hook/", "/shop/"))
    routes = [SinkRoute(name="shop", match=["/shop/*"], url_env="TEST_SHOP_URL"),
              SinkRoute(name="news", match=["/news/*"], min_severity="high")]
    cfg = _config(routes=routes)
    push_hour(store, [], [update("inc-s", 1, H2, ("/shop/a",))])
    push_hour(store, [], [], spills=[_spill("/pay", "inc-s", "/x"),  # via an unrouted member, but its root is a shop page
                                     _spill("/n1", "inc-n", "/news/x"), _spill("/n2", "inc-n", "/news/x"),  # low
                                     _spill("/m1", "inc-m", "/misc")], hour=H3)  # no route
    clock = lambda: datetime(2026, 11, 20, 12, 30, tzinfo=UTC).timestamp()  # noqa: E731
    counters = _worker(cfg, store, clock=clock).run(drained=True)
    assert [(p["path"], p["headers"]["idempotency-key"]) for p in hook.posts] == [
        ("/shop/SECRET-TOKEN", "incident|inc-s|1"), ("/shop/SECRET-TOKEN", f"spill|inc-s|{H3}")]
    assert counters["below_severity"] == 2 and counters["no_route"] == 1
    stats = store.hash_all(sink_keys(cfg, "chat").stats.replace("@", "2026112012"))  # the clock's UTC hour
    assert stats == {b"below_severity": b"1", b"no_route": b"1"}  # one held note each, not one per entry

    push_hour(store, [], [], spills=[_spill("/cart", "inc-t", "/shop/b")], hour=H4)
    _worker(cfg, store, clock=clock).run(drained=True)  # a restart knows no roots: routed by the member
    assert hook.posts[-1]["path"] == "/shop/SECRET-TOKEN" and "/cart" in hook.posts[-1]["body"]["text"]
