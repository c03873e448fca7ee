"""A stopping worker stops listening for RQ's commands at once, whichever thread reads Redis's reply first.

RQ's worker listens for its commands (stop a job, shut down) from a redis-py pub/sub thread. When it
stops, RQ sent UNSUBSCRIBE, then told that thread to stop and joined it without a limit. A thread that
read the reply first found no subscription left and waited up to 60 s for a new one: after a burst,
one worker in three overran the supervisor's 10 s grace period and was killed. The test makes the
thread read the reply first, every time, on a real Redis (the session's private redis-server).
"""

from __future__ import annotations

import threading
import time
from typing import Any

from redis import Redis

from service.settings import Settings
from worker.process.main import build_worker


def test_unsubscribing_returns_at_once_when_the_listening_thread_reads_the_reply_first(
    tmp_path: Any, redis_url: str
) -> None:
    redis = Redis.from_url(redis_url)
    settings = Settings.load({"data_dir": tmp_path, "database_url": "", "redis_url": redis_url,
                              "queue_name": f"unsub-{tmp_path.name}"}, environ={})
    worker = build_worker(settings, redis, name=f"unsub-{tmp_path.name}")
    worker.subscribe()
    pubsub, listening = worker.pubsub, worker.pubsub_thread
    assert pubsub is not None and listening is not None
    deadline = time.monotonic() + 5
    while not pubsub.subscribed and time.monotonic() < deadline:  # the thread has read the SUBSCRIBE reply
        time.sleep(0.01)
    send = pubsub.unsubscribe

    def unsubscribe_then_let_the_thread_read_the_reply(*args: Any) -> Any:
        answer = send(*args)
        settle = time.monotonic() + 2
        while pubsub.subscribed and time.monotonic() < settle:
            time.sleep(0.005)
        return answer

    pubsub.unsubscribe = unsubscribe_then_let_the_thread_read_the_reply  # type: ignore[method-assign]
    stopping = threading.Thread(target=worker.unsubscribe, daemon=True)
    started = time.monotonic()
    stopping.start()
    stopping.join(timeout=10)
    assert not stopping.is_alive(), "the worker is still waiting for its listening thread"
    assert time.monotonic() - started < 3
    listening.join(timeout=2)
    assert not listening.is_alive()
    redis.close()
