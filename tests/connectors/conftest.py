"""Fixtures the connector tests share."""

from __future__ import annotations

import pytest

from connectors.local_brokers import REDIS_SERVER, LocalRedis


@pytest.fixture(scope="module")
def plain_redis(tmp_path_factory):
    """A redis-server on a loopback port without persistence, one per test module."""
    if REDIS_SERVER is None:
        pytest.skip("redis-server is not installed (bash .ci/brokers.sh install adds it)")
    server = LocalRedis(tmp_path_factory.mktemp("redis"), durable=False).start()
    yield server
    server.stop()
