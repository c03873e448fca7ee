"""The order in which a worker takes the teams' queues, and the cap on one team's running jobs.

A worker listens on the check queue first, then on the work queues (``service.submission.team_queues``). It
reads the registered team queues before every dequeue, so a team that appears later is served without a
restart. After taking a job from a queue it moves that queue behind the others (round robin), so the next
free worker turns to the next team: one team's burst of N jobs delays another team's job by at most one job
per worker, not N. Workers rotate independently; with W workers and T busy teams each team gets about W/T
of the fleet.

Round robin alone still lets a team hold every worker while only it has work, and a team whose jobs are
long keeps them until those jobs end. ``team_max_running_jobs`` caps a team's running jobs across the
fleet: a worker claims a slot (``claim``, one atomic script) before it runs a team's job and releases it
after; a job that finds its team's slots taken goes back to the front of its queue and the worker skips
that queue until a slot frees. A claim lives as long as the job's heartbeat, so a killed worker's slot
frees within the heartbeat TTL.
"""

from __future__ import annotations

import random
import time
from collections.abc import Sequence
from typing import Any

from redis import Redis
from rq.executions import Execution
from rq.job import Job
from rq.queue import Queue

from service.settings import Settings
from service.submission import team_queues
from worker.process.outages import OutageTolerantWorker, outage_tolerated

# How long an idle worker waits on the queues it knows before it reads the registered team queues again:
# the longest a new team's first job can wait for an idle worker.
REFRESH_SECONDS = 2

CLAIM_SCRIPT = """
redis.call('ZREMRANGEBYSCORE', KEYS[1], '-inf', ARGV[1])
if redis.call('ZCARD', KEYS[1]) < tonumber(ARGV[3]) then
  redis.call('ZADD', KEYS[1], ARGV[2], ARGV[4])
  redis.call('EXPIRE', KEYS[1], ARGV[5])
  return 1
end
return 0
"""


def next_order(current: Sequence[str], registered: Sequence[str]) -> list[str]:
    """Return the work queues to listen on, keeping ``current``'s rotation and appending new ones.

    Queues no longer registered are dropped (a Redis that lost the set; the base queue is always listed).
    """
    kept = [name for name in current if name in registered]
    return kept + [name for name in registered if name not in kept]


def rotate_after(order: Sequence[str], served: str) -> list[str]:
    """Return ``order`` with ``served`` moved behind the others: the next dequeue prefers every other queue."""
    if served not in order:
        return list(order)
    return [name for name in order if name != served] + [served]


def claims_key(queue_name: str) -> str:
    """Return the key of the sorted set holding a team queue's running-job claims (job id -> expiry time)."""
    return f"{queue_name}:running"


def running(redis: Redis, queue_name: str, now: float) -> int:
    """Return how many of a team queue's jobs hold an unexpired claim."""
    return int(redis.zcount(claims_key(queue_name), f"({now}", "+inf"))


def claim(redis: Redis, queue_name: str, job_id: str, cap: int, now: float, ttl: int) -> bool:
    """Take one of a team queue's ``cap`` running slots for ``job_id`` until ``now + ttl``; False when all are held.

    Expired claims (a worker killed while running) are dropped first. One script, so two workers cannot
    both take the last slot.
    """
    taken = redis.eval(CLAIM_SCRIPT, 1, claims_key(queue_name), now, now + ttl, cap, job_id, ttl * 4)
    return bool(taken)


def renew(redis: Redis, queue_name: str, job_id: str, now: float, ttl: int) -> None:
    """Extend a running job's claim (with its heartbeat), and the key's life; no-op when the job holds none."""
    with redis.pipeline() as pipe:
        pipe.zadd(claims_key(queue_name), {job_id: now + ttl}, xx=True)
        pipe.expire(claims_key(queue_name), ttl * 4)
        pipe.execute()


def release(redis: Redis, queue_name: str, job_id: str) -> None:
    """Give a finished job's slot back."""
    redis.zrem(claims_key(queue_name), job_id)


class FairQueueWorker(OutageTolerantWorker):
    """A worker that serves the check queue first, then the work queues in turn, within each team's cap.

    ``fair`` is off for a checker (check queue only). ``settings`` is set by ``build_worker``.
    """

    fair = False
    settings: Settings | None = None
    _fair_order: list[str]

    def refresh_queues(self) -> None:
        """Listen on the check queue, then on every registered work queue whose team is under its cap."""
        if not self.fair or self.settings is None:
            return
        settings = self.settings
        registered = team_queues.work_queue_names(self.connection, settings)
        self._fair_order = next_order(getattr(self, "_fair_order", []), registered)
        cap, now = settings.team_max_running_jobs, time.time()
        open_ = [n for n in self._fair_order
                 if not cap or not team_queues.is_team_queue(settings, n) or running(self.connection, n, now) < cap]
        known = {q.name: q for q in self.queues}
        listed = [settings.check_queue_name, *self._fair_order]
        self.queues = [known.get(n) or self._make_queue(n) for n in listed]
        by_name = {q.name: q for q in self.queues}
        self._ordered_queues = [by_name[settings.check_queue_name], *(by_name[n] for n in open_)]

    def _make_queue(self, name: str) -> Queue:
        return self.queue_class(name, connection=self.connection, job_class=self.job_class,
                                serializer=self.serializer, death_penalty_class=self.death_penalty_class)

    def dequeue_job_and_maintain_ttl(self, timeout: int | None, max_idle_time: int | None = None) -> Any:
        """Wait for a job in short rounds, reading the registered team queues before each."""
        if not self.fair or max_idle_time is not None:
            return super().dequeue_job_and_maintain_ttl(timeout, max_idle_time)
        while True:
            with outage_tolerated(self, "reading the team queues"):  # else the last lists; the wait rides it out
                self.refresh_queues()
            if timeout is None:  # burst: look once
                return super().dequeue_job_and_maintain_ttl(None)
            wait = min(timeout, REFRESH_SECONDS)
            result = super().dequeue_job_and_maintain_ttl(wait, wait)
            if result is not None or self._stop_requested:
                return result

    def reorder_queues(self, reference_queue: Queue) -> None:
        """Move the queue a job was just taken from behind the other work queues."""
        if not self.fair:
            super().reorder_queues(reference_queue)
            return
        self._fair_order = rotate_after(getattr(self, "_fair_order", []), reference_queue.name)

    def _capped(self, queue_name: str) -> bool:
        return bool(self.fair and self.settings is not None and self.settings.team_max_running_jobs
                    and team_queues.is_team_queue(self.settings, queue_name))

    def take_slot(self, job: Job, queue: Queue) -> bool:
        """Claim a running slot of the job's team, or put the job back at the front of its queue."""
        if not self._capped(queue.name):
            return True
        assert self.settings is not None
        if claim(self.connection, queue.name, job.id, self.settings.team_max_running_jobs, time.time(),
                 self.job_monitoring_interval + 60):
            return True
        with self.connection.pipeline() as pipe:
            pipe.lrem(queue.intermediate_queue_key, 1, job.id)
            queue._enqueue_job(job, pipeline=pipe, at_front=True)
            pipe.execute()
        self.log.info("job %s put back: its team runs %d job(s), its cap", job.id,
                      self.settings.team_max_running_jobs)
        return False

    def free_slot(self, job: Job, queue: Queue) -> None:
        """Give the job's running slot back (no-op without a cap)."""
        if self._capped(queue.name):
            with outage_tolerated(self, "releasing a running slot"):  # unreleased, the claim lapses with its TTL
                release(self.connection, queue.name, job.id)

    def maintain_heartbeats(self, job: Job, execution: Execution) -> None:
        super().maintain_heartbeats(job, execution)
        if self._capped(job.origin):
            renew(self.connection, job.origin, job.id, time.time(), self.job_monitoring_interval + 60)

    def enqueue_ready_dependents(self, attempts: int = 4) -> None:
        """Enqueue the jobs RQ left in the ready registries of this worker's queues.

        When a job's last dependency finishes, RQ 3 moves it to a ready registry and enqueues it
        at once -- under WATCH, so when two of its dependencies finish at the same moment on two
        workers, each enqueue attempt can be invalidated by the other and the job waits for the
        next registry clean-up, up to ``MAINTENANCE_INTERVAL`` later. Fold jobs of a small table
        finish within milliseconds of each other, which made that wait common (1 submission in 30
        on breast cancer, two workers), so every worker drains these registries after each job,
        retrying a contended one a few times. The registries are looked at in one round trip: they are
        nearly always empty, and this runs after every job.
        """
        with self.connection.pipeline(transaction=False) as pipe:
            for queue in self.queues:
                pipe.zcard(queue.ready_job_registry.key)
            waiting = pipe.execute()
        for queue, count in zip(self.queues, waiting, strict=True):
            if not count:
                continue
            registry = queue.ready_job_registry
            for attempt in range(attempts):
                if attempt:
                    if not self.connection.zcard(registry.key):
                        break
                    time.sleep(random.uniform(0.001, 0.005) * attempt)  # step out of the other's way
                registry.cleanup()
