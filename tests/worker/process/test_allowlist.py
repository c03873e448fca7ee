"""The worker runs only allow-listed job functions, deserialised as JSON."""

from __future__ import annotations

import dataclasses
import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path
from typing import Any

import fakeredis
import pytest
from redis import Redis
from rq import Queue
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer
from rq.worker import Worker

from service.settings import Settings
from tests.support.records import upgraded_engine
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.process import main
from worker.process.main import ALLOWED_CALLBACKS, AllowListedJob, RefusedJob, build_worker

ROOT = Path(__file__).resolve().parents[3]


def _job(connection: Any, func: str, **kwargs: Any) -> AllowListedJob:
    job = AllowListedJob.create(func, args=("x",), connection=connection, serializer=JSONSerializer, **kwargs)
    job.retries_left = 2
    return job


def test_allowed_names_resolve_to_the_job_functions() -> None:
    redis = fakeredis.FakeRedis()
    assert _job(redis, "worker.jobs.run_fold").func is jobs.run_fold
    assert _job(redis, "worker.jobs.score_holdout").func is jobs.score_holdout


@pytest.mark.parametrize("name", ["os.system", "subprocess.check_output", "worker.jobs.current",
                                  "worker.jobs.holdout.score_holdout", "builtins.eval"])
def test_other_names_are_refused_without_retries(name: str) -> None:
    job = _job(fakeredis.FakeRedis(), name)
    with pytest.raises(RefusedJob, match="does not run"):
        _ = job.func
    assert job.retries_left == 0  # refusing again on a retry would change nothing


def test_callbacks_are_refused() -> None:
    assert not ALLOWED_CALLBACKS
    job = _job(fakeredis.FakeRedis(), "worker.jobs.run_fold", on_failure="os.system")
    with pytest.raises(RefusedJob, match="callback"):
        _ = job.func
    assert job.failure_callback is None  # never imported, even on the failure path


def test_worker_is_configured_for_fast_abandonment() -> None:
    from service.settings import Settings

    settings = Settings.load({"queue_name": "q"}, environ={})
    worker = build_worker(settings, fakeredis.FakeRedis())
    assert [q.name for q in worker.queues] == ["q-check", "q"]
    assert worker.job_class is AllowListedJob and worker.serializer is JSONSerializer
    # An abandoned job's heartbeat lapses after monitoring interval + 60 s; maintenance then retries it.
    assert worker.job_monitoring_interval <= 10 and worker.maintenance_interval <= 30
    assert worker.job_monitoring_interval + 60 + worker.maintenance_interval <= 120
    # An idle worker only runs maintenance between blocking dequeues of worker_ttl - 15 s.
    assert worker.dequeue_timeout <= worker.maintenance_interval


def test_real_worker_refuses_a_foreign_function(tmp_path: Path, redis_url: str) -> None:
    """A real forking `python -m worker --burst` on a private redis-server."""
    queue_name = f"allow-{uuid.uuid4().hex[:8]}"
    redis = Redis.from_url(redis_url)
    queue = Queue(queue_name, connection=redis, serializer=JSONSerializer)
    marker = tmp_path / "pwned"
    foreign = queue.enqueue_call("os.system", args=(f"touch {marker}",))
    # rq's default serializer is pickle; the worker reads JSON only, so this payload is never unpickled.
    pickled = Queue(queue_name, connection=redis).enqueue_call("os.system", args=(f"touch {marker}-pickle",))
    allowed = queue.enqueue_call("worker.jobs.check_config",
                                 args=({"model": {"estimator": "Ridge", "features": []}}, "ds_nope"))
    env = {**os.environ, "SEALFOLD_DATA_DIR": str(tmp_path / "data"), "REDIS_URL": redis_url,
           "DATABASE_URL": "", "SEALFOLD_QUEUE": queue_name, "SEALFOLD_LOG_LEVEL": "WARNING"}
    upgraded_engine(Settings.load({"data_dir": tmp_path / "data", "database_url": ""}, environ={})).dispose()
    started = time.monotonic()
    done = subprocess.run([sys.executable, "-m", "worker", "--burst", "--name", queue_name], env=env, cwd=ROOT,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-3000:]
    assert time.monotonic() - started < 120

    foreign = Job.fetch(foreign.id, connection=redis, serializer=JSONSerializer)
    assert foreign.get_status() == JobStatus.FAILED
    assert "does not run" in (foreign.latest_result().exc_string or "")  # type: ignore[union-attr]
    assert not marker.exists()
    assert Job.fetch(pickled.id, connection=redis, serializer=JSONSerializer).get_status() == JobStatus.FAILED
    assert not Path(f"{marker}-pickle").exists()
    allowed = Job.fetch(allowed.id, connection=redis, serializer=JSONSerializer)
    assert allowed.get_status() == JobStatus.FINISHED
    answer = allowed.return_value()
    assert answer["ok"] is False and answer["problems"][0]["pointer"] == "/dataset"


def test_checks_summaries_verdicts_and_folds_run_in_the_worker_process_and_every_other_job_forks(
    ctx: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    settings = dataclasses.replace(ctx.settings, queue_name=f"inproc-{uuid.uuid4().hex[:8]}")
    redis = Redis.from_url(redis_url)
    forked: list[str | None] = []
    # RQ's forking execute_job, which SealfoldWorker defers to for every job worker.process.placement forks.
    monkeypatch.setattr(Worker, "execute_job", lambda _self, job, _queue: forked.append(job.func_name))
    monkeypatch.setattr(main, "reconcile_once", lambda _redis: 0)  # keep the shared Redis's lock untouched
    check = Queue(settings.check_queue_name, connection=redis, serializer=JSONSerializer).enqueue_call(
        "worker.jobs.check_config", args=({"model": {"estimator": "Ridge", "features": []}}, "ds_nope"))
    work = Queue(settings.queue_name, connection=redis, serializer=JSONSerializer)
    fold = work.enqueue_call("worker.jobs.run_fold", args=("sub_nope", 0, 0))
    summary = work.enqueue_call("worker.jobs.summarize", args=("sub_nope",))
    work.enqueue_call("worker.jobs.score_holdout", args=("sub_nope",))
    verdict = work.enqueue_call("worker.jobs.give_verdict", args=("sub_nope",))
    work.enqueue_call("os.system", args=("true",))
    handlers = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        build_worker(settings, redis, name=settings.queue_name).work(burst=True, with_scheduler=False)
    finally:
        for number, handler in handlers.items():
            signal.signal(number, handler)
    # The holdout job opens the seal and fits: always a horse. A refused name is never run in-process.
    assert forked == ["worker.jobs.score_holdout", "os.system"]
    done = Job.fetch(check.id, connection=redis, serializer=JSONSerializer)
    assert done.get_status() == JobStatus.FINISHED
    answer = done.return_value()
    assert answer is not None and answer["ok"] is False and answer["problems"][0]["pointer"] == "/dataset"
    for ran_here in (fold, summary, verdict):  # ran here, and failed here
        failed = Job.fetch(ran_here.id, connection=redis, serializer=JSONSerializer)
        assert failed.get_status() == JobStatus.FAILED
        assert "no submission 'sub_nope'" in (failed.latest_result().exc_string or "")  # type: ignore[union-attr]
