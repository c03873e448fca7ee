"""The records DB is the system of record: work survives a killed worker and a flushed Redis."""

from __future__ import annotations

import os
import signal
import time
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest
from redis import Redis
from sklearn.datasets import make_regression

from service.submission import team_queues
from tests.support.datasets import diabetes_frame, register
from tests.support.servers import redis_server, start_worker
from tests.support.stack import Stack, running_stack


@pytest.fixture
def lonely_stack(tmp_path: Path) -> Iterator[Stack]:
    """A stack of its own (own redis-server, one worker), so flushing Redis disturbs no other test."""
    with redis_server(tmp_path) as url, running_stack(tmp_path / "data", url, "lonely", workers=1) as live:
        yield live


def test_work_survives_a_killed_worker_and_a_flushed_redis(lonely_stack: Stack) -> None:
    stack = lonely_stack
    ds = register(stack.client("steward"), diabetes_frame(), name="resilience", target="target",
                  task="regression")
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": ds["id"], "model": {"estimator": "GradientBoostingRegressor",
                                       "params": {"n_estimators": 400, "max_depth": 4}}})
    assert reply.status == 202, reply.text
    sub_id = reply.json()["id"]
    deadline = time.monotonic() + 60
    while stack.client().get(f"/v1/submissions/{sub_id}").json()["state"] == "queued":
        assert time.monotonic() < deadline, "no worker picked the submission up"
        time.sleep(0.05)

    # Lose the machine running the worker (parent and work horse), then lose everything Redis held.
    victim = stack.workers[0]
    os.killpg(victim.pid, signal.SIGKILL)
    victim.wait(timeout=10)
    Redis.from_url(stack.settings.redis_url).flushall()

    started = time.monotonic()
    stack.workers.append(start_worker(stack.env, "lonely-replacement", stack.log_path))
    doc = stack.wait_for(sub_id, timeout=240)
    recovered_in = time.monotonic() - started
    assert doc["state"] == "succeeded", doc
    assert doc["progress"] == {"folds_done": 5, "folds_total": 5}
    assert doc["result"]["holdout"]["released"] is True
    print(f"recovered after worker loss and Redis flush in {recovered_in:.1f} s")


def test_the_job_of_a_killed_worker_is_retried_within_two_minutes(lonely_stack: Stack) -> None:
    # Without a Redis flush the job stays "started" in Redis; RQ's registry clean-up declares it
    # abandoned once its heartbeat lapses and retries it (retries are set on every sealfold job).
    stack = lonely_stack
    sub_id, in_flight = _slow_folds_under_way(stack, "abandoned")
    victim = stack.workers[0]
    os.killpg(victim.pid, signal.SIGKILL)  # the worker and its fold process, mid-fold
    victim.wait(timeout=10)
    killed_job = in_flight[0]
    assert stack.client().get(f"/v1/submissions/{sub_id}").json()["progress"]["folds_done"] < 5

    started = time.monotonic()
    stack.workers.append(start_worker(stack.env, "abandoned-replacement", stack.log_path))
    doc = stack.wait_for(sub_id, timeout=150)  # "retried within about two minutes", plus the folds themselves
    recovered_in = time.monotonic() - started
    assert doc["state"] == "succeeded", doc
    assert doc["progress"]["folds_done"] == 5
    print(f"{killed_job} was abandoned by a killed worker; the submission finished {recovered_in:.1f} s later")


def _slow_folds_under_way(stack: Stack, name: str) -> tuple[str, list[str]]:
    """Submit a slow model (about a second per fold) and return once a fold job has started.

    Data: scikit-learn's make_regression, 2,000 rows of 8 features.
    """
    X, y = make_regression(n_samples=2000, n_features=8, noise=1.0, random_state=5)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(8)]).assign(y=y)
    ds = register(stack.client("steward"), frame, name=name, target="y", task="regression")
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": ds["id"], "model": {"estimator": "GradientBoostingRegressor",
                                       "params": {"n_estimators": 200, "max_depth": 4}}})
    assert reply.status == 202, reply.text
    redis = Redis.from_url(stack.settings.redis_url)
    deadline = time.monotonic() + 60
    # A job per fold, or one for every fold of a small table (<sub>-folds)
    while not (in_flight := [j for j in team_queues.started_job_ids(redis, stack.settings) if "-fold" in j]):
        assert time.monotonic() < deadline, "no fold job started"
        time.sleep(0.02)
    return str(reply.json()["id"]), in_flight


def _children(pid: int) -> set[int]:
    return {int(c) for c in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()}


def test_a_crashed_fold_process_fails_only_its_job_which_is_retried_at_once(lonely_stack: Stack) -> None:
    # The worker's fold process runs every fold; when it dies mid-fold (a segfault, the OOM killer),
    # the worker lives on, RQ retries the job and a new fold process runs it.
    stack = lonely_stack
    worker = stack.workers[0]
    (fold_process,) = _children(worker.pid)  # the only child of an idle worker
    sub_id, _in_flight = _slow_folds_under_way(stack, "crashed")
    os.kill(fold_process, signal.SIGKILL)
    started = time.monotonic()
    doc = stack.wait_for(sub_id, timeout=60)  # no heartbeat to lapse: the retry is immediate
    assert doc["state"] == "succeeded", doc
    assert doc["progress"]["folds_done"] == 5
    assert worker.poll() is None and fold_process not in _children(worker.pid)
    print(f"the fold process was killed mid-fold; the submission finished {time.monotonic() - started:.1f} s later")
