"""The work queues: one RQ queue per team, so one team's burst does not hold back another team's submission.

A submission's jobs go to its team's queue, ``<queue_name>:t:<digest>`` (the digest of the team id: no team
name appears in a Redis key). Each enqueue adds the queue to a Redis set (``<queue_name>:team-queues``), so
workers, which read the set before every dequeue, serve a team that appeared after they started. Workers take
the team queues in turn (``worker.process.fair_order``); within a team the order is the enqueue order, the
holdout first.

The base queue, ``<queue_name>``, stays a work queue: jobs enqueued before the split, and anything enqueued
directly on it, still run. A queue never leaves the set: removing an empty one could race an enqueue that
has just registered it, leaving jobs on a queue no worker listens to; a key per team that ever submitted is
cheap.

Every walk over "the work queue" (the reconciler's live jobs, the metrics, tests and benchmarks that look at
running jobs) goes through ``work_queues``.
"""

from __future__ import annotations

import hashlib

from redis import Redis
from rq import Queue
from rq.registry import StartedJobRegistry
from rq.serializers import JSONSerializer

from service.settings import Settings

TEAM_MARK = ":t:"


def registry_key(settings: Settings) -> str:
    """Return the key of the Redis set that lists the team queues."""
    return f"{settings.queue_name}:team-queues"


def team_queue_name(settings: Settings, team: str) -> str:
    """Return the name of ``team``'s work queue: a digest, so keys and queue names do not carry the team."""
    digest = hashlib.sha256(f"{settings.queue_name}\0{team}".encode()).hexdigest()[:16]
    return f"{settings.queue_name}{TEAM_MARK}{digest}"


def is_team_queue(settings: Settings, name: str) -> bool:
    """Tell a team's queue from the base and the check queue."""
    return name.startswith(settings.queue_name + TEAM_MARK)


def team_queue(redis: Redis, settings: Settings, team: str) -> Queue:
    """Return ``team``'s work queue, registered so that workers listen to it."""
    name = team_queue_name(settings, team)
    redis.sadd(registry_key(settings), name)
    return Queue(name, connection=redis, serializer=JSONSerializer)


def work_queue_names(redis: Redis, settings: Settings) -> list[str]:
    """Return the base queue's name, then every registered team queue's, in a stable order."""
    members = redis.smembers(registry_key(settings))
    names = sorted(m.decode() if isinstance(m, bytes) else str(m) for m in members)
    return [settings.queue_name, *names]


def work_queues(redis: Redis, settings: Settings) -> list[Queue]:
    """Return every queue submission work may be on."""
    return [Queue(n, connection=redis, serializer=JSONSerializer) for n in work_queue_names(redis, settings)]


def started_job_ids(redis: Redis, settings: Settings) -> list[str]:
    """Return the ids of the submission jobs running now, over every work queue."""
    ids: list[str] = []
    for queue in work_queues(redis, settings):
        ids += StartedJobRegistry(queue=queue).get_job_ids(cleanup=False)
    return ids
