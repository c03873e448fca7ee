"""A worker that rides out a Redis outage instead of exiting, and registers again when Redis forgot it.

RQ retries a lost connection while it blocks waiting for a job, but a connection error anywhere else in its
work loop (a state update at start or before each wait, the suspension check, maintenance, the heartbeat
after a job) ends the worker, and a deployment without a supervisor then has none. Here those calls skip a
beat and the wait for the next job backs off (1 s, doubling, at most 30 s) until Redis answers. A Redis that
comes back empty (a restart without persistence, a FLUSHALL) no longer lists the worker: the next heartbeat
registers it again, so ``/readyz`` and the API see it.
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

    def heartbeat(self, timeout: int | None = None, pipeline: Any = None) -> None:
        if pipeline is not None:
            super().heartbeat(timeout, pipeline)
            return
        with outage_tolerated(self, "the heartbeat"):
            if not self.connection.exists(self.key):
                self.log.warning("worker %s: Redis no longer knows this worker; registering again", self.name)
                self.register_birth()
            super().heartbeat(timeout)
