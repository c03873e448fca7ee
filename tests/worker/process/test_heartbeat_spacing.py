"""The worker's own heartbeat: at most one per second, and it still re-registers a worker Redis forgot.

RQ keeps a worker listed while its key lives (``worker_ttl``, here 45 s; RQ's docs, "Workers"), and
sends the heartbeat that extends it three times around every job. One per second keeps the key alive
with the same margin.
"""

from __future__ import annotations

from typing import Any

import fakeredis
import pytest
from rq.worker import Worker

from service.settings import Settings
from worker.process import outages
from worker.process.main import build_worker


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


@pytest.fixture
def clock(monkeypatch: pytest.MonkeyPatch) -> Clock:
    fake = Clock()
    monkeypatch.setattr(outages.time, "monotonic", fake)
    return fake


def _beats(redis: Any, key: str) -> str | None:
    value = redis.hget(key, "last_heartbeat")
    return None if value is None else value.decode()


def test_heartbeats_within_a_second_are_skipped_and_later_ones_sent(clock: Clock) -> None:
    redis = fakeredis.FakeRedis()
    worker = build_worker(Settings.load(environ={}), redis, "spacing")
    worker.register_birth()
    worker.heartbeat()
    first = _beats(redis, worker.key)
    assert first is not None and redis.ttl(worker.key) > 0
    redis.hdel(worker.key, "last_heartbeat")
    clock.now += 0.5
    worker.heartbeat()
    worker.heartbeat()
    assert _beats(redis, worker.key) is None  # skipped: the key still lives for the whole worker_ttl
    clock.now += 0.6
    worker.heartbeat()
    assert _beats(redis, worker.key) is not None
    assert 0 < redis.ttl(worker.key) <= worker.worker_ttl + 60


def test_a_worker_redis_forgot_is_registered_again_at_the_next_heartbeat_sent(clock: Clock) -> None:
    redis = fakeredis.FakeRedis()
    worker = build_worker(Settings.load(environ={}), redis, "forgotten")
    worker.register_birth()
    worker.heartbeat()
    redis.flushall()
    clock.now += 1.1
    worker.heartbeat()
    assert "forgotten" in {w.name for w in Worker.all(connection=redis)}


def test_a_heartbeat_in_rqs_own_pipeline_is_never_skipped(clock: Clock) -> None:
    redis = fakeredis.FakeRedis()
    worker = build_worker(Settings.load(environ={}), redis, "piped")
    worker.register_birth()
    worker.heartbeat()
    redis.hdel(worker.key, "last_heartbeat")
    with redis.pipeline() as pipe:
        worker.heartbeat(70, pipeline=pipe)
        pipe.execute()
    assert _beats(redis, worker.key) is not None
