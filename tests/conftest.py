"""Fixtures every test folder may use: a private redis-server for the session."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.support.servers import redis_server


@pytest.fixture(scope="session")
def redis_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A private redis-server for the whole session (never the machine's own on 6379)."""
    with redis_server(tmp_path_factory.mktemp("redis")) as url:
        yield url
