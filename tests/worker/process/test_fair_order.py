"""The fair order of a worker: the teams' queues in turn, new teams picked up at runtime, a team's running cap.

The pure functions are checked on lists; the worker on the session's real redis-server, dequeuing (not running)
jobs in burst mode, as RQ's work loop does, so the order read back is the order a worker would run them in.
"""

from __future__ import annotations

import dataclasses
import threading
import time
import uuid
from collections.abc import Iterator
from typing import Any

import pytest
from redis import Redis
from rq import Queue
from rq.serializers import JSONSerializer

from service.settings import Settings
from service.submission import team_queues
from worker.jobs.runtime import WorkerContext
from worker.process import fair_order, main
from worker.process.main import SealfoldWorker, build_worker


def test_next_order_keeps_the_rotation_appends_new_queues_and_drops_gone_ones() -> None:
    assert fair_order.next_order([], ["base", "t1", "t2"]) == ["base", "t1", "t2"]
    assert fair_order.next_order(["t2", "base", "t1"], ["base", "t1", "t2", "t3"]) == ["t2", "base", "t1", "t3"]
    assert fair_order.next_order(["t2", "base", "t1"], ["base", "t1"]) == ["base", "t1"]


def test_rotate_after_moves_the_served_queue_behind_the_others() -> None:
    assert fair_order.rotate_after(["base", "t1", "t2"], "t1") == ["base", "t2", "t1"]
    assert fair_order.rotate_after(["base", "t2", "t1"], "t2") == ["base", "t1", "t2"]
    assert fair_order.rotate_after(["base", "t1"], "elsewhere") == ["base", "t1"]


def test_a_claim_holds_one_of_cap_slots_until_released_or_expired(redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    queue = f"claims-{uuid.uuid4().hex[:8]}"
    assert fair_order.claim(redis, queue, "a", cap=2, now=1000.0, ttl=10)
    assert fair_order.claim(redis, queue, "b", cap=2, now=1000.0, ttl=10)
    assert not fair_order.claim(redis, queue, "c", cap=2, now=1001.0, ttl=10)  # both slots held
    assert fair_order.running(redis, queue, 1001.0) == 2
    fair_order.release(redis, queue, "a")
    assert fair_order.claim(redis, queue, "c", cap=2, now=1001.0, ttl=10)
    fair_order.renew(redis, queue, "c", now=1005.0, ttl=10)  # "c" now holds its slot until 1015
    # "b" was never renewed: its worker died. Its claim lapses at 1010 and its slot frees.
    assert fair_order.running(redis, queue, 1012.0) == 1
    assert fair_order.claim(redis, queue, "d", cap=2, now=1012.0, ttl=10)
    assert not fair_order.claim(redis, queue, "e", cap=2, now=1012.0, ttl=10)


@pytest.fixture
def worker(ctx: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch) -> Iterator[SealfoldWorker]:
    """A fold worker built before any team queue exists, on a queue name of its own."""
    monkeypatch.setattr(main, "reconcile_once", lambda _redis: 0)  # keep the shared Redis's lock untouched
    settings = dataclasses.replace(ctx.settings, queue_name=f"fair-{uuid.uuid4().hex[:8]}")
    built = build_worker(settings, Redis.from_url(redis_url), name=settings.queue_name)
    yield built
    built.register_death()


def _enqueue(worker: SealfoldWorker, team: str, count: int) -> list[str]:
    assert worker.settings is not None
    queue = team_queues.team_queue(worker.connection, worker.settings, team)
    return [queue.enqueue_call("worker.jobs.summarize", args=(f"sub_{team}{i}",), job_id=f"sub_{team}{i}-summary").id
            for i in range(count)]


def _dequeue_all(worker: SealfoldWorker) -> list[str]:
    taken: list[str] = []
    while (result := worker.dequeue_job_and_maintain_ttl(None)) is not None:  # burst mode: look once
        taken.append(result[0].id)
    return taken


def _team(job_id: str) -> str:
    return job_id[len("sub_"):-len("0-summary")]


def test_a_worker_takes_the_teams_in_turn_and_each_team_in_its_own_order(worker: SealfoldWorker) -> None:
    burst = _enqueue(worker, "fleet", 5)  # the teams appear after the worker started
    single = _enqueue(worker, "rivals", 2)
    taken = _dequeue_all(worker)
    assert sorted(taken) == sorted(burst + single)
    # While both teams have work, they alternate; FIFO over one queue would give the burst first.
    assert [_team(j) for j in taken[:4]] in (["fleet", "rivals"] * 2, ["rivals", "fleet"] * 2)
    assert [j for j in taken if j in burst] == burst and [j for j in taken if j in single] == single


def test_a_waiting_worker_serves_a_team_that_appears_while_it_waits(
    worker: SealfoldWorker, monkeypatch: pytest.MonkeyPatch
) -> None:
    """No restart: the wait is cut into rounds, and each round reads the registered team queues again."""
    monkeypatch.setattr(fair_order, "REFRESH_SECONDS", 1)
    assert worker.settings is not None
    base = Queue(worker.settings.queue_name, connection=worker.connection, serializer=JSONSerializer)
    late = threading.Timer(0.5, _enqueue, (worker, "newcomers", 1))
    # Should the worker never look at the new queue, a job on the base queue ends its wait instead.
    fallback = threading.Timer(20, base.enqueue_call, ("worker.jobs.summarize", ("sub_base",)),
                               {"job_id": "sub_base-summary"})
    late.start()
    fallback.start()
    try:
        result: Any = worker.dequeue_job_and_maintain_ttl(30)  # a waiting (not burst) worker
    finally:
        late.cancel()
        fallback.cancel()
    assert result[0].id == "sub_newcomers0-summary"


def test_a_team_at_its_running_cap_is_skipped_until_a_slot_frees(worker: SealfoldWorker) -> None:
    assert worker.settings is not None
    worker.settings = dataclasses.replace(worker.settings, team_max_running_jobs=1)
    burst = _enqueue(worker, "fleet", 2)
    single = _enqueue(worker, "rivals", 1)
    fleet = team_queues.team_queue_name(worker.settings, "fleet")
    assert fair_order.claim(worker.connection, fleet, "running-elsewhere", 1, time.time(), 60)  # another worker's job
    assert _dequeue_all(worker) == single  # the fleet has work queued, but its one slot is taken
    fair_order.release(worker.connection, fleet, "running-elsewhere")
    assert _dequeue_all(worker) == burst


def test_a_job_that_finds_its_teams_slots_taken_goes_back_to_the_front_of_its_queue(worker: SealfoldWorker) -> None:
    assert worker.settings is not None
    worker.settings = dataclasses.replace(worker.settings, team_max_running_jobs=1)
    first, second = _enqueue(worker, "fleet", 2)
    result: Any = worker.dequeue_job_and_maintain_ttl(None)
    job, queue = result
    assert job.id == first and worker.take_slot(job, queue)
    assert worker.dequeue_job_and_maintain_ttl(None) is None  # this worker now skips the team's queue
    # A second worker that was already waiting on the queue (its list read before the slot was taken) takes
    # the next job at the same moment.
    other: Any = queue.dequeue_any([queue], None, connection=worker.connection, job_class=worker.job_class,
                                   serializer=worker.serializer)
    assert other[0].id == second and not worker.take_slot(*other)
    assert queue.get_job_ids() == [second]  # back at the front, for when the slot frees
    worker.free_slot(job, queue)
    assert worker.take_slot(*other)


def test_a_checker_listens_on_the_check_queue_only(ctx: WorkerContext, redis_url: str) -> None:
    settings: Settings = dataclasses.replace(ctx.settings, queue_name=f"fair-{uuid.uuid4().hex[:8]}")
    redis = Redis.from_url(redis_url)
    team_queues.team_queue(redis, settings, "fleet")
    checker = build_worker(settings, redis, checker=True)
    checker.refresh_queues()
    assert checker.queue_names() == [settings.check_queue_name]
