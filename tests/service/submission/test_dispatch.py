"""The reconciler: put back the unfinished work of a submission after Redis lost it, once.

Real redis-server (the session's), a queue of each test's own, and a SQLite records DB on tmp_path.
What is queued and what waits for what is read back through RQ's own API (Job.fetch, the queue and
its registries), and job ids are spelled out as the format ``<sub>-fold-<repeat>-<fold>`` etc.
"""

from __future__ import annotations

import dataclasses
from datetime import timedelta
from typing import Any

import pytest
from redis import Redis
from rq import Queue
from rq.job import Job, JobStatus
from rq.registry import DeferredJobRegistry, FinishedJobRegistry, StartedJobRegistry
from rq.serializers import JSONSerializer
from rq.utils import current_timestamp
from sqlalchemy import Engine, update

from service.ids import new_id
from service.records import champion_folds, champions, submissions
from service.records.engine import utcnow
from service.records.tables import submissions as submissions_table
from service.settings import Settings
from service.submission import dispatch, team_queues
from service.submission.resolved import ValidationPlan
from service.vocabulary import LIVE_STATES
from tests.support.frames import diabetes_frame
from tests.support.records import add_dataset_row


@pytest.fixture
def dataset(records: Engine) -> dict[str, Any]:
    """Diabetes (Efron et al. 2004, bundled with scikit-learn) as a registered dataset row."""
    return add_dataset_row(records, diabetes_frame(), "target", "regression", folds=3)


def lost_submission(engine: Engine, dataset: dict[str, Any], *, folds: int = 3, repeats: int = 1,
                    age: timedelta = timedelta(hours=1)) -> str:
    """Insert a queued submission last touched ``age`` ago, whose jobs Redis never held; return its id."""
    sub_id = new_id("sub")
    submissions.insert(engine, {
        "id": sub_id, "team": dataset["team"], "dataset_id": dataset["id"], "owner_key_id": "key_owner",
        "label": "", "config_fingerprint": new_id("cfg").ljust(64, "0")[:64], "folds_total": folds * repeats,
        "config": {"model": {"estimator": "Ridge", "params": {}, "features": ["bmi"], "preprocess": []},
                   "validation": {"scheme": "kfold", "folds": folds, "seed": 0, "repeats": repeats,
                                  "plan_overridden": False},
                   "metrics": ["rmse"], "label": "", "task": "regression", "target": "target"},
    })
    touch(engine, sub_id, age)
    return sub_id


def touch(engine: Engine, sub_id: str, age: timedelta) -> None:
    """Set a submission's ``updated_at`` to ``age`` ago (the reconciler leaves recent ones alone)."""
    with engine.begin() as conn:
        conn.execute(update(submissions_table).where(submissions_table.c.id == sub_id)
                     .values(updated_at=utcnow() - age))


def record_folds(engine: Engine, sub_id: str, cells: list[tuple[int, int]]) -> None:
    for r, f in cells:
        submissions.record_fold(engine, sub_id, r, f, status="ok", train_rows=266, test_rows=134,
                                scores={"rmse": 55.0}, baseline_scores={"rmse": 77.0}, coefficients=None,
                                fit_seconds=0.01, score_seconds=0.001, error=None)


def store_holdout(engine: Engine, sub_id: str) -> None:
    submissions.store_holdout_once(engine, sub_id, {"rmse": 54.0}, "h" * 64, 0.1)


def store_summary(engine: Engine, sub_id: str) -> None:
    submissions.store_summary(engine, sub_id, {"summary": {"rmse": {"mean": 55.0}}})


def queue_of(redis: Redis, settings: Settings, team: str = "fleet") -> Queue:
    """The work queue of ``team`` (the datasets' team here: add_dataset_row's default)."""
    return team_queues.team_queue(redis, settings, team)


def job(redis: Redis, job_id: str) -> Job:
    return Job.fetch(job_id, connection=redis, serializer=JSONSerializer)


def waits_for(redis: Redis, job_id: str) -> set[str]:
    """The ids a job depends on, as RQ stored them."""
    return set(job(redis, job_id).dependency_ids)


def test_a_lost_submission_is_enqueued_whole_with_the_holdout_first(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3, repeats=2)
    assert dispatch.reconcile(records, redis, settings) == 1 + 6 + 1 + 1  # holdout, folds, summary, verdict
    queue = queue_of(redis, settings)
    folds = [f"{sub}-fold-{r}-{f}" for r in range(2) for f in range(3)]
    assert queue.get_job_ids() == [f"{sub}-holdout", *folds]  # the longest job first, then the folds in order
    assert set(DeferredJobRegistry(queue=queue).get_job_ids()) == {f"{sub}-summary", f"{sub}-verdict"}
    assert waits_for(redis, f"{sub}-summary") == set(folds)
    assert waits_for(redis, f"{sub}-verdict") == {f"{sub}-summary", f"{sub}-holdout"}
    for waiting in (f"{sub}-summary", f"{sub}-verdict"):
        assert job(redis, waiting).allow_dependency_failures is True  # a failed fold still gets summarised
        assert job(redis, waiting).get_status() == JobStatus.DEFERRED
    assert [(job(redis, i).func_name, job(redis, i).args) for i in (f"{sub}-holdout", folds[4], f"{sub}-summary",
                                                                     f"{sub}-verdict")] == [
        ("worker.jobs.score_holdout", [sub]), ("worker.jobs.run_fold", [sub, 1, 1]),
        ("worker.jobs.summarize", [sub]), ("worker.jobs.give_verdict", [sub])]


def test_the_reconciled_chain_is_the_chain_a_new_submission_gets(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=4)
    dispatch.reconcile(records, redis, settings)
    reconciled = queue_of(redis, settings).get_job_ids()
    chain = {i: waits_for(redis, i) for i in (f"{sub}-summary", f"{sub}-verdict")}
    fresh = dataclasses.replace(settings, queue_name=settings.queue_name + "-fresh")
    # A fresh enqueue rewrites the same job ids.
    dispatch.enqueue_submission(redis, fresh, "fleet", sub, ValidationPlan("kfold", folds=4, seed=0))
    assert queue_of(redis, fresh).get_job_ids() == reconciled and len(reconciled) == 5
    assert {i: waits_for(redis, i) for i in chain} == chain


def test_only_the_missing_folds_are_enqueued_and_the_summary_waits_for_them(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    record_folds(records, sub, [(0, 0), (0, 2)])
    store_holdout(records, sub)
    touch(records, sub, timedelta(hours=1))  # recording work touched it
    assert dispatch.reconcile(records, redis, settings) == 3
    assert queue_of(redis, settings).get_job_ids() == [f"{sub}-fold-0-1"]  # no second holdout score
    assert waits_for(redis, f"{sub}-summary") == {f"{sub}-fold-0-1"}
    assert waits_for(redis, f"{sub}-verdict") == {f"{sub}-summary"}


def test_a_summarised_submission_gets_its_holdout_and_verdict_but_no_folds(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    record_folds(records, sub, [(0, 0), (0, 1)])  # fold 2 left no row, yet the summary was taken
    store_summary(records, sub)
    touch(records, sub, timedelta(hours=1))
    assert dispatch.reconcile(records, redis, settings) == 2
    assert queue_of(redis, settings).get_job_ids() == [f"{sub}-holdout"]
    assert waits_for(redis, f"{sub}-verdict") == {f"{sub}-holdout"}
    assert job(redis, f"{sub}-verdict").get_status() == JobStatus.DEFERRED
    assert not redis.exists(f"rq:job:{sub}-fold-0-2") and not redis.exists(f"rq:job:{sub}-summary")


def test_with_summary_and_holdout_stored_only_the_verdict_is_queued_at_once(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    record_folds(records, sub, [(0, 0), (0, 1), (0, 2)])
    store_summary(records, sub)
    store_holdout(records, sub)
    touch(records, sub, timedelta(hours=1))
    assert dispatch.reconcile(records, redis, settings) == 1
    assert queue_of(redis, settings).get_job_ids() == [f"{sub}-verdict"]
    assert waits_for(redis, f"{sub}-verdict") == set()


def test_jobs_redis_still_holds_are_left_alone(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    dispatch.enqueue_submission(redis, settings, "fleet", sub, ValidationPlan("kfold", folds=3, seed=0))
    queue = queue_of(redis, settings)
    before = queue.get_job_ids()
    assert dispatch.reconcile(records, redis, settings) == 0
    assert queue.get_job_ids() == before == [f"{sub}-holdout", f"{sub}-fold-0-0", f"{sub}-fold-0-1",
                                             f"{sub}-fold-0-2"]


def test_a_live_job_running_every_fold_covers_the_folds_not_recorded(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    dispatch.enqueue_submission(redis, settings, "fleet", sub, ValidationPlan("kfold", folds=3, seed=0), together=True)
    record_folds(records, sub, [(0, 0)])  # its first fold is done; it still runs the other two
    touch(records, sub, timedelta(hours=1))
    queue = queue_of(redis, settings)
    assert queue.get_job_ids() == [f"{sub}-holdout", f"{sub}-folds"]
    assert (job(redis, f"{sub}-folds").func_name, job(redis, f"{sub}-folds").args) == (
        "worker.jobs.run_folds", [sub, [[0, 0], [0, 1], [0, 2]]])
    assert not Job.exists(f"{sub}-summary", connection=redis)  # it summarises the folds itself
    assert waits_for(redis, f"{sub}-verdict") == {f"{sub}-folds", f"{sub}-holdout"}
    assert dispatch.reconcile(records, redis, settings) == 0
    assert queue.get_job_ids() == [f"{sub}-holdout", f"{sub}-folds"]


def test_a_lost_job_running_every_fold_is_replaced_by_a_job_per_missing_fold(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    dispatch.enqueue_submission(redis, settings, "fleet", sub, ValidationPlan("kfold", folds=3, seed=0), together=True)
    record_folds(records, sub, [(0, 1)])
    touch(records, sub, timedelta(hours=1))
    redis.flushdb()  # Redis lost every job
    # the holdout, the 2 missing folds, the summary and the verdict
    assert dispatch.reconcile(records, redis, settings) == 1 + 2 + 1 + 1
    assert queue_of(redis, settings).get_job_ids() == [f"{sub}-holdout", f"{sub}-fold-0-0", f"{sub}-fold-0-2"]
    assert waits_for(redis, f"{sub}-summary") == {f"{sub}-fold-0-0", f"{sub}-fold-0-2"}


def test_stopping_a_submission_stops_its_job_of_every_fold(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    validation = ValidationPlan("kfold", folds=3, seed=0)
    dispatch.enqueue_submission(redis, settings, "fleet", sub, validation, together=True)
    assert dispatch.stop_jobs(redis, settings, sub, validation) == 3  # the holdout, the folds and the verdict
    assert job(redis, f"{sub}-folds").get_status() == JobStatus.CANCELED


def test_folds_run_together_on_tables_up_to_the_batch_size(settings: Settings) -> None:
    assert settings.fold_batch_max_rows == 5000  # the default
    assert dispatch.folds_together(settings, 5000) and dispatch.folds_together(settings, 1)
    assert not dispatch.folds_together(settings, 5001)
    assert not dispatch.folds_together(dataclasses.replace(settings, fold_batch_max_rows=0), 10)


def test_a_job_taken_by_a_worker_that_died_before_starting_it_is_put_back(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    sub = lost_submission(records, dataset, folds=3)
    dispatch.enqueue_submission(redis, settings, "fleet", sub, ValidationPlan("kfold", folds=3, seed=0))
    queue = queue_of(redis, settings)
    # Taken off the queue, never started: the job hash still says "queued", but no list holds it.
    redis.lrem(queue.key, 0, f"{sub}-fold-0-1")
    assert job(redis, f"{sub}-fold-0-1").get_status() == JobStatus.QUEUED
    assert dispatch.reconcile(records, redis, settings) == 1
    assert queue.get_job_ids() == [f"{sub}-holdout", f"{sub}-fold-0-0", f"{sub}-fold-0-2", f"{sub}-fold-0-1"]
    assert waits_for(redis, f"{sub}-summary") == {f"{sub}-fold-0-{f}" for f in range(3)}


def test_running_twice_or_on_a_second_worker_enqueues_nothing_more(
    records: Engine, redis: Redis, redis_url: str, settings: Settings, dataset: dict[str, Any]
) -> None:
    subs = [lost_submission(records, dataset, folds=3) for _ in range(2)]
    assert dispatch.reconcile(records, redis, settings) == 2 * 6
    ids = queue_of(redis, settings).get_job_ids()
    assert dispatch.reconcile(records, redis, settings) == 0
    other_worker = Redis.from_url(redis_url)  # its own connection, as another worker process has
    try:
        assert dispatch.reconcile(records, other_worker, settings) == 0
    finally:
        other_worker.close()
    assert queue_of(redis, settings).get_job_ids() == ids
    assert len(ids) == len(set(ids)) == 2 * 4 and {i.rsplit("-", 3)[0] for i in ids} == set(subs)


def test_a_reconciler_that_starts_while_another_runs_queues_nothing(
    records: Engine, redis_url: str, settings: Settings, dataset: dict[str, Any], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Two reconcilers that both read the live jobs before either writes would each push every missing
    job id onto the queue, and RQ runs a job once per queue entry; the second must find the first at work."""
    sub = lost_submission(records, dataset, folds=3)
    real = dispatch.live_job_ids
    second: list[int] = []

    def look_then_let_another_start(queue: Queue) -> set[str]:
        live = real(queue)  # the first has read Redis and not yet written to it
        connection = Redis.from_url(redis_url)
        try:
            second.append(dispatch.reconcile(records, connection, settings))
        finally:
            connection.close()
        return live

    monkeypatch.setattr(dispatch, "live_job_ids", look_then_let_another_start)
    redis = Redis.from_url(redis_url)
    try:
        first = dispatch.reconcile(records, redis, settings)
        assert (first, second) == (6, [0])
        ids = queue_of(redis, settings).get_job_ids()
        assert sorted(ids) == sorted([f"{sub}-holdout", *(f"{sub}-fold-0-{f}" for f in range(3))])
        assert not redis.exists(f"{dispatch.RECONCILE_LOCK}:{settings.queue_name}")  # released after the run
    finally:
        redis.close()


def test_finished_and_recently_touched_submissions_are_left_alone(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    finished = {}
    for state in ("succeeded", "failed", "canceled"):
        sub = lost_submission(records, dataset, folds=3)
        assert submissions.transition(records, sub, state, LIVE_STATES)
        touch(records, sub, timedelta(hours=1))
        finished[state] = sub
    young = lost_submission(records, dataset, folds=3, age=timedelta(seconds=2))  # a POST still enqueueing
    assert dispatch.reconcile(records, redis, settings) == 0
    assert queue_of(redis, settings).get_job_ids() == []
    # Old enough, the young one is reconciled; the finished ones never are.
    assert dispatch.reconcile(records, redis, settings, min_age_seconds=1.0) == 6
    assert {i.rsplit("-", 3)[0] for i in queue_of(redis, settings).get_job_ids()} == {young}
    assert not any(redis.exists(f"rq:job:{sub}-verdict") for sub in finished.values())


def test_live_jobs_are_those_queued_taken_started_deferred_ready_or_scheduled(
    redis: Redis, settings: Settings
) -> None:
    queue = queue_of(redis, settings)

    def enqueue(job_id: str, **options: Any) -> Job:
        return queue.enqueue_call("worker.jobs.summarize", args=("sub_x",), job_id=job_id, **options)

    queued = enqueue("queued")
    enqueue("deferred", depends_on=queued)
    queue.enqueue_in(timedelta(hours=1), "worker.jobs.summarize", "sub_x", job_id="scheduled")
    enqueue("taken")
    redis.lmove(queue.key, queue.intermediate_queue.key, "RIGHT", "LEFT")  # as a worker's dequeue takes it
    started = StartedJobRegistry(queue=queue)
    # RQ 3 keeps "<job id>:<execution id>" entries scored by their expiry time.
    redis.zadd(started.key, {"running:exec1": current_timestamp() + 60, "abandoned:exec2": current_timestamp() - 60})
    done = enqueue("finished")
    queue.remove(done)
    FinishedJobRegistry(queue=queue).add(done, -1)
    ready = enqueue("ready", depends_on=queued)
    DeferredJobRegistry(queue=queue).remove(ready)
    with redis.pipeline() as pipe:
        pipe.multi()
        queue.ready_job_registry.register_jobs([ready], pipeline=pipe)
        pipe.execute()
    assert dispatch.live_job_ids(queue) == {"queued", "deferred", "scheduled", "taken", "running", "ready"}


def test_a_champion_on_another_plan_is_scored_on_this_plan_and_the_verdict_waits_for_it(
    records: Engine, redis: Redis, settings: Settings, dataset: dict[str, Any]
) -> None:
    champion = lost_submission(records, dataset, folds=5)
    champions.promote(records, dataset["id"], champion, "key_steward")
    sub = lost_submission(records, dataset, folds=3)
    validation = ValidationPlan("kfold", folds=3, seed=0)
    assert dispatch.champion_to_replay(records, dataset["id"], validation) == champion
    assert dispatch.champion_to_replay(records, dataset["id"], ValidationPlan("kfold", folds=5, seed=0)) is None
    dispatch.enqueue_submission(redis, settings, "fleet", sub, validation, champion)
    replay = {f"{sub}-champion-0-{f}" for f in range(3)}
    assert replay <= set(queue_of(redis, settings).get_job_ids())
    assert waits_for(redis, f"{sub}-verdict") == {f"{sub}-summary", f"{sub}-holdout", *replay}
    assert job(redis, f"{sub}-champion-0-2").args == [sub, champion, 0, 2]

    # After a Redis loss, the reconciler puts back only the cells not cached for this plan.
    redis.flushdb()
    champion_folds.record(records, champion, "kfold-3-0", 0, 1, status="ok", scores={"rmse": 50.0},
                          train_rows=266, test_rows=134, error=None)
    dispatch.reconcile(records, redis, settings)
    queued = set(queue_of(redis, settings).get_job_ids())
    assert {f"{sub}-champion-0-0", f"{sub}-champion-0-2"} <= queued and f"{sub}-champion-0-1" not in queued
    assert {f"{sub}-champion-0-0", f"{sub}-champion-0-2"} <= waits_for(redis, f"{sub}-verdict")
