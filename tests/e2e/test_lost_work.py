"""No verdict on work that did not happen: lost folds are retried elsewhere, or the submission fails naming why.

Real stacks (own redis-server, real forking workers). Data: scikit-learn's diabetes table, and
make_regression for folds slow enough to be caught mid-run.
"""

from __future__ import annotations

import os
import shutil
import signal
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from redis import Redis
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer
from sklearn.datasets import make_regression

from service.ops.data_identity import marker_path
from service.submission import team_queues
from service.submission.dispatch import fold_job_id, folds_job_id, holdout_job_id
from tests.support.datasets import diabetes_frame, register
from tests.support.servers import redis_server, start_worker, stop_processes
from tests.support.stack import Stack, running_stack
from worker.jobs.failure import AVOID_WORKERS

pytestmark = pytest.mark.slow


def _submit(stack: Stack, ds_id: str, estimator: str, params: dict[str, Any]) -> str:
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": ds_id, "model": {"estimator": estimator, "params": params}})
    assert reply.status == 202, reply.text
    return str(reply.json()["id"])


def _blind_worker(stack: Stack, tmp_path: Path, name: str) -> Any:
    """Start a worker on the same records DB and Redis whose data dir has no datasets: a stale copy of the
    volume that still carries the deployment's identity marker (an empty or foreign dir is refused at start,
    tests/worker/process/test_data_refusal.py), so the worker starts and then cannot read the files."""
    blind = tmp_path / f"{name}-data"
    blind.mkdir()
    shutil.copy2(marker_path(stack.data_dir), marker_path(blind))
    env = {**stack.env, "SEALFOLD_DATA_DIR": str(blind), "DATABASE_URL": stack.settings.effective_database_url}
    return start_worker(env, name, stack.log_path)


def _wait_registered(stack: Stack, count: int) -> None:
    from rq.worker import Worker

    redis = Redis.from_url(stack.settings.redis_url)
    deadline = time.monotonic() + 90
    while Worker.count(connection=redis) < count:
        assert time.monotonic() < deadline, stack.log_path.read_text(errors="replace")[-3000:]
        time.sleep(0.1)


@pytest.fixture
def own_stack(tmp_path: Path) -> Iterator[Stack]:
    """A stack of its own with one good worker."""
    with redis_server(tmp_path) as url, running_stack(tmp_path / "data", url, "lost", workers=1) as live:
        yield live


def test_a_worker_without_the_data_leaves_the_folds_to_a_worker_with_it(own_stack: Stack, tmp_path: Path) -> None:
    stack = own_stack
    blind = _blind_worker(stack, tmp_path, "lost-blind")
    stack.workers.append(blind)
    _wait_registered(stack, 2)
    ds = register(stack.client("steward"), diabetes_frame(), name="two-mounts", target="target", task="regression")
    subs = [_submit(stack, ds["id"], "Ridge", {"alpha": a}) for a in (0.5, 1.0, 2.0)]
    docs = [stack.wait_for(s, timeout=180) for s in subs]
    for doc in docs:
        assert doc["state"] == "succeeded", doc
        assert doc["failure_cause"] is None
        assert doc["progress"] == {"folds_done": 5, "folds_total": 5}
        assert doc["result"]["cv"]["failures"] == []
    # The blind worker did take work, failed to read it, and left the retries to the good one.
    redis = Redis.from_url(stack.settings.redis_url)
    ids = [i for s in subs for i in fold_ids(s)] + [holdout_job_id(s) for s in subs]
    avoided = [j.meta.get(AVOID_WORKERS) for j in Job.fetch_many(ids, connection=redis, serializer=JSONSerializer)
               if j is not None]
    assert ["lost-blind"] in avoided, avoided


def test_folds_no_worker_can_read_fail_the_submission_naming_missing_data(
    own_stack: Stack, tmp_path: Path
) -> None:
    stack = own_stack
    ds = register(stack.client("steward"), diabetes_frame(), name="no-mount", target="target", task="regression")
    stop_processes(stack.workers)  # the only worker with the data is gone
    stack.workers = [_blind_worker(stack, tmp_path, "lost-blind-only")]
    _wait_registered(stack, 1)
    doc = stack.wait_for(_submit(stack, ds["id"], "Ridge", {}), timeout=120)
    assert doc["state"] == "failed", doc
    assert doc["failure_cause"] == "missing_data"
    assert "could not read the dataset's files" in doc["error"]
    assert doc["result"] is None or doc["result"]["verdict"] is None  # no verdict on work that did not happen


def fold_ids(sub_id: str) -> list[str]:
    """The ids of a 5-fold submission's fold work in either shape: one job for every fold, or a job per fold."""
    return [folds_job_id(sub_id), *(fold_job_id(sub_id, 0, f) for f in range(5))]


@pytest.fixture(params=["one job for every fold", "a job per fold"])
def shaped_stack(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Stack]:
    """A stack of its own with one good worker, running a small table's folds in one job or a job per fold."""
    settings = {} if request.param == "one job for every fold" else {"fold_batch_max_rows": 0}
    with redis_server(tmp_path) as url, running_stack(tmp_path / "data", url, "lost", workers=1,
                                                      settings=settings) as live:
        yield live


def _slow_dataset(stack: Stack, name: str) -> dict[str, Any]:
    """2,000 rows of scikit-learn's make_regression: a GradientBoostingRegressor of 200 trees takes ~1 s a fold."""
    X, y = make_regression(n_samples=2000, n_features=8, noise=1.0, random_state=5)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(8)]).assign(y=y)
    return register(stack.client("steward"), frame, name=name, target="y", task="regression")


def _children(pid: int) -> set[int]:
    return {int(c) for c in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()}


def test_a_fold_killed_by_the_system_on_every_attempt_fails_the_submission_naming_memory(shaped_stack: Stack) -> None:
    """A SIGKILL the worker did not send -- what the kernel's OOM killer does -- is retried, then a memory failure."""
    stack = shaped_stack
    ds = _slow_dataset(stack, "killed-folds")
    sub_id = _submit(stack, ds["id"], "GradientBoostingRegressor", {"n_estimators": 400, "max_depth": 4})
    redis = Redis.from_url(stack.settings.redis_url)
    # The 1,600 development rows are a small table: by default its folds run in one job.
    target = fold_job_id(sub_id, 0, 0) if stack.settings.fold_batch_max_rows == 0 else folds_job_id(sub_id)
    worker = stack.workers[0]
    kills = 0
    deadline = time.monotonic() + 120
    # Three attempts (the first and both retries) must start, each killed within moments of starting, long
    # before its fold could end: watched in Redis alone, every 20 ms, however slowly the API answers on a busy
    # machine. A fourth attempt would run unkilled and succeed.
    while kills < 3:
        assert time.monotonic() < deadline, stack.log_path.read_text(errors="replace")[-3000:]
        if target in team_queues.started_job_ids(redis, stack.settings):
            fold_processes = _children(worker.pid)
            job = Job.fetch(target, connection=redis, serializer=JSONSerializer)
            assert job.get_status() != JobStatus.FINISHED, f"attempt {kills + 1} of {target} ended before its kill"
            if fold_processes and job.get_status() == JobStatus.STARTED:
                attempt = job.retries_left
                for pid in fold_processes:  # a worker running a fold has one child: its fold process
                    os.kill(pid, signal.SIGKILL)
                kills += 1
                while time.monotonic() < deadline:
                    job = Job.fetch(target, connection=redis, serializer=JSONSerializer)
                    if job.retries_left != attempt or job.get_status() == JobStatus.FAILED:
                        break
                    time.sleep(0.02)
        time.sleep(0.02)
    doc = stack.wait_for(sub_id, timeout=60)
    assert doc["state"] == "failed", doc
    assert doc["failure_cause"] == "memory_limit", doc
    assert doc["error"].startswith("fold 0 of repeat 0: the fold process was killed by the operating system "
                                   "(SIGKILL), most likely out of memory"), doc["error"]
    assert doc["result"] is None or doc["result"]["verdict"] is None


@pytest.fixture
def tight_stack(tmp_path: Path) -> Iterator[Stack]:
    """A stack whose folds time out after 2 s and whose fold processes may add at most 300 MiB."""
    with redis_server(tmp_path) as url, running_stack(
        tmp_path / "data", url, "tight", workers=1, settings={"fold_timeout_seconds": 2, "memory_limit_mib": 300},
    ) as live:
        yield live


def test_a_fold_over_its_timeout_fails_the_submission_naming_the_bound_without_retries(tight_stack: Stack) -> None:
    stack = tight_stack
    ds = _slow_dataset(stack, "timeout")
    sub_id = _submit(stack, ds["id"], "GradientBoostingRegressor", {"n_estimators": 500, "max_depth": 8})
    doc = stack.wait_for(sub_id, timeout=120)
    assert doc["state"] == "failed", doc
    assert doc["failure_cause"] == "timeout", doc
    assert "exceeded the" in doc["error"] and "timeout of" in doc["error"], doc["error"]
    assert ("timeout of 2 s" in doc["error"]) or ("timeout of 4 s" in doc["error"])  # a fold's, or the holdout's
    redis = Redis.from_url(stack.settings.redis_url)
    ids = [*fold_ids(sub_id), holdout_job_id(sub_id)]
    ended = (JobStatus.FINISHED, JobStatus.FAILED, JobStatus.STOPPED, JobStatus.CANCELED)
    deadline = time.monotonic() + 30
    while True:  # the rest of the chain is stopped: nothing stays queued or running
        jobs = [j for j in Job.fetch_many(ids, connection=redis, serializer=JSONSerializer) if j is not None]
        if all(j.get_status() in ended for j in jobs):
            break
        assert time.monotonic() < deadline, [(j.id, j.get_status()) for j in jobs]
        time.sleep(0.05)
    # Not retried: the job that timed out failed with its retries unused; the folds behind it never ran.
    timed_out = [j for j in jobs if j.get_status() == JobStatus.FAILED]
    assert len(timed_out) == 1 and timed_out[0].retries_left in (0, None), [(j.id, j.retries_left) for j in jobs]
    if timed_out[0].id == folds_job_id(sub_id):  # one job for every fold: it stopped at its first, the one timed out
        assert doc["error"].startswith("fold 0 of repeat 0 exceeded the fold timeout of 2 s"), doc["error"]
        assert stack.client().get(f"/v1/submissions/{sub_id}").json()["progress"]["folds_done"] == 0
    else:
        assert any(j.get_status() == JobStatus.CANCELED for j in jobs)


def test_a_fold_over_the_memory_limit_fails_naming_the_limit(tight_stack: Stack) -> None:
    # A brute-force KNeighborsRegressor on the cosine metric (not one of scikit-learn's fast argkmin
    # metrics) computes test x train distances in chunks of scikit-learn's working_memory (1 GiB by
    # default): 4,000 x 16,000 float64 distances, some 490 MiB, beyond 300 MiB.
    stack = tight_stack
    X, y = make_regression(n_samples=20000, n_features=4, noise=1.0, random_state=3)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(4)]).assign(y=y)
    ds = register(stack.client("steward"), frame, name="memory", target="y", task="regression")
    sub_id = _submit(stack, ds["id"], "KNeighborsRegressor", {"algorithm": "brute", "metric": "cosine"})
    doc = stack.wait_for(sub_id, timeout=120)
    assert doc["state"] == "failed", doc
    assert doc["failure_cause"] == "memory_limit", doc
    assert "memory limit 300 MiB exceeded" in doc["error"], doc["error"]
