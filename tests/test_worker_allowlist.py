"""The worker runs only allow-listed job functions, deserialised as JSON."""

from __future__ import annotations

import os
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

from worker import jobs
from worker.main import ALLOWED_CALLBACKS, AllowListedJob, RefusedJob, build_worker

ROOT = Path(__file__).resolve().parent.parent


def _job(connection: Any, func: str, **kwargs: Any) -> AllowListedJob:
    job = AllowListedJob.create(func, args=("x",), connection=connection, serializer=JSONSerializer, **kwargs)
    job.retries_left = 2
    return job


def test_allowed_names_resolve_to_the_job_functions() -> None:
    redis = fakeredis.FakeRedis()
    assert _job(redis, "worker.jobs.run_fold").func is jobs.run_fold
    assert _job(redis, "worker.jobs.score_holdout").func is jobs.score_holdout


@pytest.mark.parametrize("name", ["os.system", "subprocess.check_output", "worker.jobs.current",
                                  "worker.holdout.score_holdout", "builtins.eval"])
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
