"""The worker's Redis client resolves redis-py's version once, not at every connection a horse opens."""

from __future__ import annotations

import pytest
import redis.utils

from worker.process.connection import worker_redis


def test_new_connections_do_not_read_the_package_metadata(monkeypatch: pytest.MonkeyPatch) -> None:
    client = worker_redis("redis://127.0.0.1:1/0")
    reads: list[str] = []
    real = redis.utils.get_lib_version

    def counted() -> str:
        reads.append("read")
        return real()

    monkeypatch.setattr(redis.utils, "get_lib_version", counted)
    connection = client.connection_pool.make_connection()  # what a forked horse's pool does first
    assert reads == []
    info = getattr(connection, "driver_info", None)
    if info is not None:  # redis-py 7 and later announce name and version (CLIENT SETINFO)
        assert info.lib_version == real()
        assert info.formatted_name == "redis-py"
    client.close()


def test_a_plain_client_reads_it_per_connection(monkeypatch: pytest.MonkeyPatch) -> None:
    """What the test above guards against: without a resolved DriverInfo each new connection reads it."""
    pytest.importorskip("redis.driver_info")
    client = redis.Redis.from_url("redis://127.0.0.1:1/0")
    reads: list[str] = []
    real = redis.utils.get_lib_version
    monkeypatch.setattr(redis.utils, "get_lib_version", lambda: reads.append("read") or real())
    client.connection_pool.make_connection()
    assert reads == ["read"]
    client.close()
