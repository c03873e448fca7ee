"""A worker that rides out a Redis outage instead of exiting, and registers again when Redis forgot it.

RQ retries a lost connection while it blocks waiting for a job, but a connection error anywhere else in its
work loop (a state update at start or before each wait, the suspension check, maintenance, the heartbeat
after a job) ends the worker, and a deployment without a supervisor then has none. Here those calls skip a
beat and the wait for the next job backs off (1 s, doubling, at most 30 s) until Redis answers. A Redis that
comes back empty (a restart without persistence, a FLUSHALL) no longer lists the worker: the next heartbeat
registers it again, so ``/readyz`` and the API see it.

RQ sends the worker's own heartbeat three times around every job (after it, before and after waiting
for the next), each four Redis round trips here. The worker's key lives for minutes (``worker_ttl``), so
a heartbeat within ``HEARTBEAT_SPACING_SECONDS`` of the last one is skipped, and one that is sent goes as
one pipeline after the existence check: a worker running dozens of small jobs a second no longer spends a
dozen round trips per job on them. Job heartbeats (the started registry's, sent while a job runs) are
RQ's own and unchanged.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import TimeoutError as RedisTimeoutError
from rq.worker import Worker

OUTAGE_BACKOFF_MAX_SECONDS = 30.0
HEARTBEAT_SPACING_SECONDS = 1.0


@contextmanager
def outage_tolerated(worker: Worker, what: str) -> Iterator[None]:
    """Log and skip ``what`` when Redis cannot be reached, instead of letting the work loop end."""
    try:
        yield
    except (RedisConnectionError, RedisTimeoutError) as exc:
        worker.log.error("worker %s: Redis unreachable during %s (%s); carrying on", worker.name, what, exc)


class OutageTolerantWorker(Worker):
    """RQ's worker, carrying on through Redis outages."""

    def dequeue_job_and_maintain_ttl(self, timeout: int | None, max_idle_time: int | None = None) -> Any:
        wait = 1.0
        while True:
            try:
                return super().dequeue_job_and_maintain_ttl(timeout, max_idle_time)
            except (RedisConnectionError, RedisTimeoutError) as exc:
                if self._stop_requested:
                    return None
                self.log.error("worker %s: Redis unreachable while waiting for a job (%s); retrying in %.0f s",
                               self.name, exc, wait)
                time.sleep(wait)
                wait = min(wait * 2, OUTAGE_BACKOFF_MAX_SECONDS)

    def set_state(self, state: Any, pipeline: Any = None) -> None:
        if pipeline is not None:
            super().set_state(state, pipeline)
            return
        with outage_tolerated(self, "a state update"):
            super().set_state(state)

    def check_for_suspension(self, burst: bool) -> None:
        with outage_tolerated(self, "the suspension check"):
            super().check_for_suspension(burst)

    _beat_sent_at: float | None = None  # monotonic time of the last heartbeat sent on its own

    def heartbeat(self, timeout: int | None = None, pipeline: Any = None) -> None:
        if pipeline is not None:
            super().heartbeat(timeout, pipeline)
            return
        beat = time.monotonic()
        if self._beat_sent_at is not None and beat - self._beat_sent_at < HEARTBEAT_SPACING_SECONDS:
            return
        with outage_tolerated(self, "the heartbeat"):
            if not self.connection.exists(self.key):
                self.log.warning("worker %s: Redis no longer knows this worker; registering again", self.name)
                self.register_birth()
            with self.connection.pipeline() as pipe:
                super().heartbeat(timeout, pipe)
                pipe.execute()
            self._beat_sent_at = beat
