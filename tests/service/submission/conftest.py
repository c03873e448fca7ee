"""Fixtures of the submission tests: a client of the session's redis-server, settings with a queue of their own."""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from redis import Redis

from service.settings import Settings


@pytest.fixture
def redis(redis_url: str) -> Iterator[Redis]:
    client = Redis.from_url(redis_url)
    yield client
    client.close()


@pytest.fixture
def settings(tmp_path: Path) -> Settings:
    """Settings with a queue no other test uses, on the data dir the ``records`` fixture uses."""
    return Settings.load({"data_dir": tmp_path / "records", "queue_name": f"submission-{uuid.uuid4().hex[:10]}"},
                         environ={})
