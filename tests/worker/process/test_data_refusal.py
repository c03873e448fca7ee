"""A worker that does not see the deployment's data refuses work, at start and before each job.

Real worker processes against a real redis-server: one started with an empty data dir exits at once with the
reason; one whose data dir loses its marker after start puts the job it took back on the queue and stops.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import uuid
from pathlib import Path

from redis import Redis
from rq import Queue
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer

from service.ops.data_identity import marker_path
from service.settings import Settings
from tests.support.records import upgraded_engine

ROOT = Path(__file__).resolve().parents[3]


def _env(tmp_path: Path, data_dir: Path, redis_url: str, queue: str) -> dict[str, str]:
    return {**os.environ, "SEALFOLD_DATA_DIR": str(data_dir), "REDIS_URL": redis_url, "SEALFOLD_QUEUE": queue,
            "DATABASE_URL": f"sqlite:///{tmp_path / 'data' / 'records.sqlite3'}", "SEALFOLD_LOG_LEVEL": "INFO"}


def test_a_worker_with_an_empty_data_dir_refuses_to_start(tmp_path: Path, redis_url: str) -> None:
    upgraded_engine(Settings.load({"data_dir": tmp_path / "data", "database_url": ""}, environ={})).dispose()
    env = _env(tmp_path, tmp_path / "elsewhere", redis_url, f"q{uuid.uuid4().hex[:8]}")
    done = subprocess.run([sys.executable, "-m", "worker", "--burst"], env=env, cwd=ROOT, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 3, done.stderr[-2000:]
    assert "refusing work" in done.stderr and "no deployment-id marker" in done.stderr


def test_a_worker_that_loses_the_data_puts_the_job_back_and_stops(tmp_path: Path, redis_url: str) -> None:
    data = tmp_path / "data"
    upgraded_engine(Settings.load({"data_dir": data, "database_url": ""}, environ={})).dispose()
    queue_name = f"q{uuid.uuid4().hex[:8]}"
    redis = Redis.from_url(redis_url)
    worker = subprocess.Popen([sys.executable, "-m", "worker", "--name", queue_name],
                              env=_env(tmp_path, data, redis_url, queue_name), cwd=ROOT,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while not redis.exists(f"rq:worker:{queue_name}") and time.monotonic() < deadline:
            assert worker.poll() is None, worker.communicate()[1][-2000:]
            time.sleep(0.2)
        marker_path(data).write_text("another-deployment\n")  # the volume was swapped under the worker
        job = Queue(queue_name, connection=redis, serializer=JSONSerializer).enqueue_call(
            "worker.jobs.summarize", args=("sub_none",))
        _, err = worker.communicate(timeout=120)
    finally:
        if worker.poll() is None:
            worker.kill()
    assert worker.returncode == 3, err[-2000:]
    assert "belongs to another deployment" in err
    assert Job.fetch(job.id, connection=redis, serializer=JSONSerializer).get_status() == JobStatus.QUEUED
    assert job.id in Queue(queue_name, connection=redis, serializer=JSONSerializer).job_ids
