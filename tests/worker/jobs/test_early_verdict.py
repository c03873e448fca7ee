"""The summary or holdout job that ends last gives the verdict itself, once, and only when all it waits on is done.

Real Redis (the session's private redis-server) and RQ job records from the service's own enqueueing; the
jobs themselves run in this process. Data: scikit-learn's bundled diabetes table (Efron et al. 2004).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from redis import Redis
from rq import Queue
from rq.job import Job, JobStatus
from rq.registry import DeferredJobRegistry
from sklearn.datasets import load_diabetes

from service.records import submissions, verdicts
from service.settings import Settings
from service.submission import dispatch
from service.submission.resolved import ValidationPlan
from tests.support.records import upgraded_engine
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs import runtime
from worker.jobs.early_verdict import judge_if_last
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict


@pytest.fixture
def ctx(tmp_path: Path, redis_url: str) -> Iterator[WorkerContext]:
    settings = Settings.load({"data_dir": tmp_path, "database_url": "", "redis_url": redis_url,
                              "queue_name": f"early-{tmp_path.name}"}, environ={})
    context = WorkerContext(settings=settings, engine=upgraded_engine(settings))
    runtime.install(context)
    yield context
    runtime.uninstall()
    context.engine.dispose()


def _enqueued(ctx: WorkerContext, redis: Redis) -> str:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge", metrics=["rmse"]))
    dispatch.enqueue_submission(redis, ctx.settings, "fleet", sub_id, ValidationPlan("kfold", folds=3, seed=0))
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    return sub_id


def _given_once(ctx: WorkerContext, redis: Redis, sub_id: str, *, last: str, other: str) -> None:
    """The job ending ``last`` gives the verdict; ``other``, ending with it, leaves it; it is given once."""
    assert judge_if_last(ctx, redis, last, sub_id)
    assert not judge_if_last(ctx, redis, other, sub_id)
    row = submissions.get(ctx.engine, sub_id)
    assert row is not None and row["verdict"] is not None and row["state"] == "succeeded"
    assert len(verdicts.history(ctx.engine, sub_id)) == 1


def test_the_last_job_to_end_gives_the_verdict_once(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    sub_id = _enqueued(ctx, redis)
    jobs.summarize(sub_id)  # outside RQ: no job of its own, so it leaves the verdict to the others
    holdout, summary = dispatch.holdout_job_id(sub_id), dispatch.summary_job_id(sub_id)
    # The holdout outcome is not stored yet: the summary's job cannot give it.
    assert not judge_if_last(ctx, redis, summary, sub_id)
    assert submissions.get(ctx.engine, sub_id)["verdict"] is None  # type: ignore[index]
    jobs.score_holdout(sub_id)
    # Both outcomes stored (RQ still has both jobs running): the job ending now gives it, and the other,
    # ending at the same moment, finds it being given.
    _given_once(ctx, redis, sub_id, last=holdout, other=summary)


def test_a_verdict_job_already_queued_is_left_to_give_it(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    sub_id = _enqueued(ctx, redis)
    jobs.summarize(sub_id)
    jobs.score_holdout(sub_id)
    # The verdict job, queued by RQ once both jobs ended.
    Job.fetch(dispatch.verdict_job_id(sub_id), connection=redis).set_status("queued")
    assert not judge_if_last(ctx, redis, dispatch.holdout_job_id(sub_id), sub_id)
    assert submissions.get(ctx.engine, sub_id)["verdict"] is None  # type: ignore[index]


def test_a_small_tables_job_of_every_fold_counts_as_done_once_it_summarised(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge", metrics=["rmse"]))
    dispatch.enqueue_submission(redis, ctx.settings, "fleet", sub_id, ValidationPlan("kfold", folds=3, seed=0),
                                together=True)
    folds = dispatch.folds_job_id(sub_id)
    jobs.score_holdout(sub_id)
    # Its folds are not summarised yet: the holdout job cannot give the verdict.
    assert not judge_if_last(ctx, redis, dispatch.holdout_job_id(sub_id), sub_id)
    answer = jobs.run_folds(sub_id, [[0, f] for f in range(3)])  # outside RQ: it summarises, leaves the verdict
    assert answer["summary"]["folds_ok"] == 3
    assert submissions.get(ctx.engine, sub_id)["cv_summary"] is not None  # type: ignore[index]
    assert submissions.get(ctx.engine, sub_id)["verdict"] is None  # type: ignore[index]
    # Ending last, with the holdout outcome stored: it gives the verdict, once.
    _given_once(ctx, redis, sub_id, last=folds, other=dispatch.holdout_job_id(sub_id))


def test_the_verdict_job_is_retired_once_the_verdict_is_given_early(ctx: WorkerContext, redis_url: str) -> None:
    redis = Redis.from_url(redis_url)
    sub_id = _enqueued(ctx, redis)
    verdict_id, holdout, summary = (dispatch.verdict_job_id(sub_id), dispatch.holdout_job_id(sub_id),
                                    dispatch.summary_job_id(sub_id))
    queue = Job.fetch(verdict_id, connection=redis).origin
    deferred = DeferredJobRegistry(queue, connection=redis)
    assert verdict_id in deferred.get_job_ids(cleanup=False)
    jobs.summarize(sub_id)
    jobs.score_holdout(sub_id)
    assert judge_if_last(ctx, redis, holdout, sub_id)
    # Gone from Redis, from the deferred registry and from the dependents of both jobs it waited on.
    assert not Job.exists(verdict_id, connection=redis)
    assert verdict_id not in deferred.get_job_ids(cleanup=False)
    for parent in (holdout, summary):
        assert verdict_id.encode() not in redis.smembers(Job.dependents_key_for(parent))
    # So the ends of those jobs, as RQ handles them, find nothing to queue.
    rq_queue = Queue(queue, connection=redis)
    for parent in (summary, holdout):
        finished = Job.fetch(parent, connection=redis)
        finished.set_status(JobStatus.FINISHED)
        assert rq_queue.enqueue_dependents(finished) == {}
    assert verdict_id not in rq_queue.get_job_ids()
    row = submissions.get(ctx.engine, sub_id)
    assert row is not None and row["state"] == "succeeded"


def test_a_verdict_job_that_cannot_be_retired_is_left_to_run(ctx: WorkerContext, redis_url: str,
                                                             monkeypatch: pytest.MonkeyPatch) -> None:
    redis = Redis.from_url(redis_url)
    sub_id = _enqueued(ctx, redis)
    jobs.summarize(sub_id)
    jobs.score_holdout(sub_id)

    def broken(*_args: object, **_kwargs: object) -> None:
        raise ConnectionError("redis went away")

    monkeypatch.setattr(Job, "delete", broken)
    assert judge_if_last(ctx, redis, dispatch.holdout_job_id(sub_id), sub_id)  # the verdict is given all the same
    assert Job.exists(dispatch.verdict_job_id(sub_id), connection=redis)  # and its job finds it given when it runs
    assert give_verdict(ctx, redis, sub_id)["verdict"] == "already judged"
