"""Where jobs run: small fold jobs in the worker's own process, bigger ones and the holdout in a horse."""

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
from tests.worker_fixtures import add_dataset, add_submission, config_document, ctx  # noqa: F401
from worker import main, placement, runtime
from worker.main import build_worker
from worker.runtime import WorkerContext

FOLD = "worker.jobs.run_fold"


@pytest.fixture
def diabetes_submission(ctx: WorkerContext) -> tuple[str, dict[str, Any]]:  # noqa: F811
    """A Ridge submission on diabetes (Efron et al. 2004, bundled with scikit-learn), 400 development rows."""
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    config = config_document(dataset, "Ridge")
    return add_submission(ctx, dataset, config), config


def with_limit(ctx: WorkerContext, cells: int) -> WorkerContext:  # noqa: F811
    return dataclasses.replace(ctx, settings=dataclasses.replace(ctx.settings, inline_fold_cells=cells))


def test_checks_summaries_and_verdicts_always_run_here_and_the_holdout_never(ctx: WorkerContext) -> None:  # noqa: F811
    for name in ("worker.jobs.check_config", "worker.jobs.summarize", "worker.jobs.judge"):
        assert placement.runs_in_process(with_limit(ctx, 0), name, ["anything"])
    for name in ("worker.jobs.score_holdout", "os.system", None):
        assert not placement.runs_in_process(with_limit(ctx, 10**12), name, ["sub_x"])


def test_a_fold_job_runs_here_up_to_the_cell_limit(
    ctx: WorkerContext, diabetes_submission: tuple[str, dict[str, Any]]  # noqa: F811
) -> None:
    sub_id, _config = diabetes_submission
    cells = 400 * 10  # development rows x the ten diabetes features
    assert placement.fold_cells(ctx, sub_id) == cells
    assert placement.runs_in_process(with_limit(ctx, cells), FOLD, [sub_id, 0, 0])
    assert not placement.runs_in_process(with_limit(ctx, cells - 1), FOLD, [sub_id, 0, 0])
    assert not placement.runs_in_process(with_limit(ctx, 0), FOLD, [sub_id, 0, 0])  # 0: always fork
    assert not placement.runs_in_process(with_limit(ctx, cells), FOLD, ["sub_nope", 0, 0])  # the horse reports it
    assert not placement.runs_in_process(with_limit(ctx, cells), FOLD, [])


@pytest.mark.parametrize("multiplier", ["search", "learning_curve"])
def test_fold_jobs_that_fit_many_times_always_fork(
    ctx: WorkerContext, diabetes_submission: tuple[str, dict[str, Any]], multiplier: str  # noqa: F811
) -> None:
    _sub_id, config = diabetes_submission
    if multiplier == "search":
        config["search"] = {"kind": "grid", "inner_folds": 3, "grid": {"alpha": [0.1, 1.0]}}
    else:
        config["validation"]["learning_curve"] = [0.5, 1.0]
    many = add_submission(ctx, {"id": _dataset_of(ctx, _sub_id)}, config)
    assert placement.fold_cells(ctx, many) is None
    assert not placement.runs_in_process(with_limit(ctx, 10**12), FOLD, [many, 0, 0])


def _dataset_of(ctx: WorkerContext, sub_id: str) -> str:  # noqa: F811
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    return str(sub["dataset_id"])


@pytest.fixture
def burst(redis_url: str, monkeypatch: pytest.MonkeyPatch) -> Iterator[tuple[Queue, list[str]]]:
    """A queue of its own and a list of the jobs RQ's forking execute_job was handed (instead of forking)."""
    queue = Queue(f"placement-{uuid.uuid4().hex[:8]}", connection=Redis.from_url(redis_url),
                  serializer=JSONSerializer)
    forked: list[str] = []
    monkeypatch.setattr(Worker, "execute_job", lambda _self, job, _queue: forked.append(job.id))
    monkeypatch.setattr(main, "reconcile_once", lambda _redis: 0)  # keep the shared Redis's lock untouched
    yield queue, forked


def _work(ctx: WorkerContext, queue: Queue) -> None:  # noqa: F811
    settings = dataclasses.replace(ctx.settings, queue_name=queue.name)
    handlers = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        build_worker(settings, queue.connection, name=queue.name).work(burst=True, with_scheduler=False)
    finally:
        for number, handler in handlers.items():
            signal.signal(number, handler)


@pytest.mark.parametrize("limit", [100_000, 0])
def test_a_burst_worker_runs_a_small_fold_here_and_forks_when_told_to(
    ctx: WorkerContext, diabetes_submission: tuple[str, dict[str, Any]], burst: tuple[Queue, list[str]],  # noqa: F811
    limit: int, monkeypatch: pytest.MonkeyPatch,
) -> None:
    sub_id, _config = diabetes_submission
    queue, forked = burst
    runtime.install(with_limit(ctx, limit))
    beating: list[str] = []
    heartbeats_while = main.SealfoldWorker.heartbeats_while

    @contextlib.contextmanager
    def spy(self: main.SealfoldWorker, job: Any, execution: Any) -> Iterator[None]:
        with heartbeats_while(self, job, execution):
            beating.append(job.id)
            yield

    monkeypatch.setattr(main.SealfoldWorker, "heartbeats_while", spy)
    job = queue.enqueue_call(FOLD, args=(sub_id, 0, 2))
    _work(ctx, queue)
    rows = submissions.fold_rows(ctx.engine, sub_id)
    if limit:
        assert forked == [] and [(r["fold"], r["status"]) for r in rows] == [(2, "ok")]
        assert beating == [job.id]  # the job function ran inside the heartbeat thread's lifetime
        assert job.get_status(refresh=True) == "finished"
    else:
        assert forked == [job.id] and rows == []  # the (stubbed) horse would have run it


def test_an_in_process_job_keeps_its_heartbeat_going_and_stops_with_it(ctx: WorkerContext, redis_url: str) -> None:  # noqa: F811
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
