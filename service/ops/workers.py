"""How many sealfold workers are alive, as Redis sees them (for ``/readyz`` and ``/metrics``)."""

from __future__ import annotations

from redis import Redis
from rq.worker import Worker


def live_workers(redis: Redis) -> int:
    """Workers whose registration has not expired.

    A worker's key lives for its TTL (45 s) and each heartbeat renews it; a worker that died, or that
    Redis forgot (a restart, a FLUSHALL), has no key, and RQ's listing skips it.
    """
    return sum(1 for worker in Worker.all(connection=redis) if worker is not None)
