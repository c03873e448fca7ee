"""A worker rides out a Redis outage and registers again when Redis comes back empty.

A real worker process and a real redis-server on a port of the test's own: the server is killed for ten
seconds and restarted with nothing in it (what a restart without persistence or a FLUSHALL leaves). The
worker must still be running, be listed again, and take the next job.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest
from redis import Redis
from rq import Queue
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer
from rq.worker import Worker

from service.settings import Settings
from tests.support.records import upgraded_engine
from tests.support.servers import free_port, redis_server_binary

ROOT = Path(__file__).resolve().parents[3]
OUTAGE_SECONDS = 10


def _start_redis(port: int, workdir: Path) -> subprocess.Popen[bytes]:
    proc = subprocess.Popen([redis_server_binary(), "--port", str(port), "--bind", "127.0.0.1", "--save", "",
                             "--appendonly", "no", "--dir", str(workdir)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT)
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            if Redis(port=port, socket_connect_timeout=0.2).ping():
                return proc
        except Exception:  # not listening yet
            time.sleep(0.05)
    raise AssertionError("redis-server did not start")


def _wait(predicate, timeout: float, proc: subprocess.Popen[str]) -> float:  # type: ignore[no-untyped-def]
    started = time.monotonic()
    while time.monotonic() - started < timeout:
        assert proc.poll() is None, f"worker exited with {proc.returncode}"
        if predicate():
            return time.monotonic() - started
        time.sleep(0.2)
    raise AssertionError(f"not within {timeout} s")


@pytest.mark.slow
@pytest.mark.timeout(180)
def test_worker_survives_an_outage_and_registers_again(tmp_path: Path) -> None:
    data = tmp_path / "data"
    upgraded_engine(Settings.load({"data_dir": data, "database_url": ""}, environ={})).dispose()
    port = free_port()
    redis_proc = _start_redis(port, tmp_path)
    redis = Redis(port=port)
    name = f"outage-{uuid.uuid4().hex[:6]}"
    env = {**os.environ, "SEALFOLD_DATA_DIR": str(data), "REDIS_URL": f"redis://127.0.0.1:{port}/0",
           "DATABASE_URL": "", "SEALFOLD_QUEUE": name, "SEALFOLD_LOG_FORMAT": "text"}
    log = (tmp_path / "worker.log").open("w")
    worker = subprocess.Popen([sys.executable, "-m", "worker", "--name", name], env=env, cwd=ROOT,
                              stdout=log, stderr=subprocess.STDOUT, text=True)
    try:
        _wait(lambda: name in {w.name for w in Worker.all(connection=redis)}, 120, worker)
        redis_proc.kill()
        redis_proc.wait()
        time.sleep(OUTAGE_SECONDS)
        assert worker.poll() is None, (tmp_path / "worker.log").read_text()[-3000:]
        redis_proc = _start_redis(port, tmp_path)  # back, and empty
        back_in = _wait(lambda: name in {w.name for w in Worker.all(connection=redis)}, 90, worker)
        job = Queue(name, connection=redis, serializer=JSONSerializer).enqueue_call(
            "worker.jobs.summarize", args=("sub_none",))
        _wait(lambda: Job.fetch(job.id, connection=redis, serializer=JSONSerializer).get_status()
              in (JobStatus.FINISHED, JobStatus.FAILED), 60, worker)
        print(f"\n[redis outage {OUTAGE_SECONDS} s] worker listed again {back_in:.1f} s after Redis returned")
    finally:
        worker.terminate()
        worker.wait(timeout=30)
        redis_proc.kill()
        redis_proc.wait()
        log.close()
