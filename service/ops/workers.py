"""How many sealfold workers are alive, as Redis sees them (for ``/readyz`` and ``/metrics``)."""

from __future__ import annotations

import socket

from redis import Redis
from rq.worker import Worker


def live_workers(redis: Redis) -> int:
    """Workers whose registration has not expired.

    A worker's key lives for its TTL (45 s) and each heartbeat renews it; a worker that died, or that
    Redis forgot (a restart, a FLUSHALL), has no key, and RQ's listing skips it.
    """
    return sum(1 for worker in Worker.all(connection=redis) if worker is not None)


def live_on_this_host(redis: Redis, hostname: str | None = None) -> list[str]:
    """Names of live workers registered from ``hostname`` (default: this host), for a container healthcheck."""
    host = hostname or socket.gethostname()
    return sorted(w.name for w in Worker.all(connection=redis) if w is not None and w.hostname == host)
