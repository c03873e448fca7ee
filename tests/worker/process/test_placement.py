"""Where jobs run: checks, summaries, verdicts and folds in the worker's own process, the holdout in a horse."""

from __future__ import annotations

import contextlib
import dataclasses
import signal
import time
import uuid
from collections.abc import Iterator
from typing import Any

import pytest
from redis import Redis
from rq import Queue
from rq.serializers import JSONSerializer
from rq.worker import Worker
from sklearn.datasets import load_diabetes

from service.records import submissions
from service.submission import dispatch
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs import runtime
from worker.jobs.fold import run_fold
from worker.jobs.runtime import WorkerContext
from worker.process import main, placement
from worker.process.main import build_worker

FOLD = "worker.jobs.run_fold"


@pytest.fixture
def diabetes_submission(ctx: WorkerContext) -> str:
    """A Ridge submission on diabetes (Efron et al. 2004, bundled with scikit-learn), 400 development rows."""
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    return add_submission(ctx, dataset, config_document(dataset, "Ridge"))


def test_checks_summaries_verdicts_and_folds_run_here_and_the_holdout_never() -> None:
    for name in ("worker.jobs.check_config", "worker.jobs.summarize", "worker.jobs.give_verdict", FOLD):
        assert placement.runs_in_process(name)
    for name in ("worker.jobs.score_holdout", "os.system", "worker.jobs.fold.run_fold", None):
        assert not placement.runs_in_process(name)


@pytest.fixture
def burst(redis_url: str, monkeypatch: pytest.MonkeyPatch) -> Iterator[tuple[Queue, list[str]]]:
    """A queue of its own and a list of the jobs RQ's forking execute_job was handed (instead of forking)."""
    queue = Queue(f"placement-{uuid.uuid4().hex[:8]}", connection=Redis.from_url(redis_url),
                  serializer=JSONSerializer)
    forked: list[str] = []
    monkeypatch.setattr(Worker, "execute_job", lambda _self, job, _queue: forked.append(job.id))
    monkeypatch.setattr(main, "reconcile_once", lambda _redis: 0)  # keep the shared Redis's lock untouched
    yield queue, forked


def _work(ctx: WorkerContext, queue: Queue) -> None:
    settings = dataclasses.replace(ctx.settings, queue_name=queue.name)
    handlers = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        build_worker(settings, queue.connection, name=queue.name).work(burst=True, with_scheduler=False)
    finally:
        for number, handler in handlers.items():
            signal.signal(number, handler)


class RecordingRunner:
    """A fold runner that runs the fold here and notes that it was asked."""

    def __init__(self, ctx: WorkerContext) -> None:
        self.ctx = ctx
        self.asked: list[tuple[str, int, int]] = []

    def run_fold(self, submission_id: str, repeat: int, fold: int) -> dict[str, Any]:
        self.asked.append((submission_id, repeat, fold))
        return run_fold(self.ctx, submission_id, repeat, fold)


@pytest.mark.parametrize("with_runner", [False, True])
def test_a_burst_worker_runs_a_fold_job_in_its_own_process_or_hands_it_to_its_fold_runner(
    ctx: WorkerContext, diabetes_submission: str, burst: tuple[Queue, list[str]],
    with_runner: bool, monkeypatch: pytest.MonkeyPatch,
) -> None:
    sub_id = diabetes_submission
    queue, forked = burst
    runner = RecordingRunner(ctx)
    runtime.install_fold_runner(runner if with_runner else None)
    beating: list[str] = []
    heartbeats_while = main.SealfoldWorker.heartbeats_while

    @contextlib.contextmanager
    def spy(self: main.SealfoldWorker, job: Any, execution: Any) -> Iterator[None]:
        with heartbeats_while(self, job, execution):
            beating.append(job.id)
            yield

    monkeypatch.setattr(main.SealfoldWorker, "heartbeats_while", spy)
    job = queue.enqueue_call(FOLD, args=(sub_id, 0, 2))
    try:
        _work(ctx, queue)
    finally:
        runtime.install_fold_runner(None)
    rows = submissions.fold_rows(ctx.engine, sub_id)
    assert forked == [] and [(r["fold"], r["status"]) for r in rows] == [(2, "ok")]
    assert job.get_status(refresh=True) == "finished"
    assert beating == [job.id]  # the job function ran inside the heartbeat thread's lifetime
    assert runner.asked == ([(sub_id, 0, 2)] if with_runner else [])


def test_an_in_process_job_keeps_its_heartbeat_going_and_stops_with_it(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    queue = Queue(f"beats-{uuid.uuid4().hex[:8]}", connection=redis, serializer=JSONSerializer)
    worker = build_worker(dataclasses.replace(ctx.settings, queue_name=queue.name), redis, name=queue.name)
    worker.register_birth()
    try:
        job = queue.enqueue_call("worker.jobs.summarize", args=("sub_x",))
        execution = worker.prepare_execution(job)
        worker.job_monitoring_interval = 0.2  # type: ignore[assignment]  # seconds; 10 in service

        def last_beat() -> float:
            return float(redis.hget(execution.key, "last_heartbeat") or 0)

        before = last_beat()
        with worker.heartbeats_while(job, execution):
            time.sleep(0.7)
            during = last_beat()
        time.sleep(0.5)
        assert during > before
        assert last_beat() == during  # no beat after the job function returned
    finally:
        worker.register_death()


def test_a_job_left_ready_by_contending_dependencies_is_enqueued_after_the_next_job(
    ctx: WorkerContext, redis_url: str
) -> None:
    # RQ 3 moves a job whose dependencies are met into its ready registry and enqueues it under WATCH;
    # two dependencies finishing at once on two workers can each spoil the other's enqueue. Put a job
    # in that state with RQ's own register_jobs, as the losing pair leaves it.
    redis = Redis.from_url(redis_url)
    queue = Queue(f"ready-{uuid.uuid4().hex[:8]}", connection=redis, serializer=JSONSerializer)
    blocker = queue.enqueue_call("worker.jobs.summarize", args=("sub_x",))
    waiting = queue.enqueue_call("worker.jobs.give_verdict", args=("sub_x",), depends_on=blocker)
    queue.remove(blocker)
    with redis.pipeline() as pipe:
        pipe.multi()
        queue.ready_job_registry.register_jobs([waiting], pipeline=pipe)
        pipe.execute()
    assert waiting.get_status(refresh=True) == "ready_to_enqueue" and waiting.id not in queue.job_ids
    assert waiting.id in dispatch.live_job_ids(queue)  # the reconciler counts it as live, not lost
    worker = build_worker(dataclasses.replace(ctx.settings, queue_name=queue.name), redis, name=queue.name)
    worker.enqueue_ready_dependents()
    assert queue.job_ids == [waiting.id] and waiting.get_status(refresh=True) == "queued"
    assert redis.zcard(queue.ready_job_registry.key) == 0
