"""A submission is answered while every fold worker is busy: a checker serves the checks and never runs a fold.

Real stack: own redis-server, one fold worker kept busy on slow folds, one checker. Data: scikit-learn's
diabetes table, and make_regression for the slow folds.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest
from redis import Redis
from rq.job import Job, JobStatus
from rq.serializers import JSONSerializer
from sklearn.datasets import make_regression

from service.submission import team_queues
from service.submission.dispatch import fold_job_id, folds_job_id
from tests.support.datasets import diabetes_frame, register
from tests.support.servers import redis_server, start_worker
from tests.support.stack import Stack, running_stack

pytestmark = pytest.mark.slow


@pytest.fixture
def checked_stack(tmp_path: Path) -> Iterator[Stack]:
    """One fold worker and one checker; a check that waited for the fold worker would time out after 2 s."""
    with redis_server(tmp_path) as url, running_stack(
        tmp_path / "data", url, "checked", workers=1, settings={"check_timeout_seconds": 2.0},
    ) as live:
        live.workers.append(start_worker(live.env, "checked-checker", live.log_path, checker=True))
        yield live


def test_posts_are_answered_while_every_fold_worker_is_busy(checked_stack: Stack) -> None:
    stack = checked_stack
    X, y = make_regression(n_samples=3000, n_features=8, noise=1.0, random_state=5)
    slow = register(stack.client("steward"), pd.DataFrame(X, columns=[f"x{i}" for i in range(8)]).assign(y=y),
                    name="slow", target="y", task="regression")
    quick = register(stack.client("steward"), diabetes_frame(), name="quick", target="target", task="regression")
    from rq.worker import Worker

    redis = Redis.from_url(stack.settings.redis_url)
    deadline = time.monotonic() + 90
    while Worker.count(connection=redis) < 2:
        assert time.monotonic() < deadline, stack.log_path.read_text(errors="replace")[-3000:]
        time.sleep(0.1)
    busy = stack.client().post("/v1/submissions", json_body={"dataset": slow["id"], "model": {
        "estimator": "GradientBoostingRegressor", "params": {"n_estimators": 500, "max_depth": 6}}})
    assert busy.status == 202, busy.text

    def started_now() -> list[str]:  # over every team's queue
        return team_queues.started_job_ids(redis, stack.settings)

    while not started_now():
        assert time.monotonic() < deadline, "the fold worker never got busy"
        time.sleep(0.02)

    accepted = [stack.client().post("/v1/submissions", json_body={
        "dataset": quick["id"], "model": {"estimator": "Ridge", "params": {"alpha": a}}}) for a in (0.5, 1.0, 2.0)]
    assert [r.status for r in accepted] == [202, 202, 202], [r.text for r in accepted]
    refused = stack.client().post("/v1/submissions", json_body={
        "dataset": quick["id"], "model": {"estimator": "SVR", "params": {"kernel": "precomputed"}}})
    assert refused.status == 422, refused.text
    assert refused.json()["errors"][0]["pointer"] == "/model/estimator"
    assert started_now(), "the fold worker finished before the POSTs; the test did not test anything"

    # Canceling the busy submission stops the fold it is running (RQ's stop command kills the worker's fold
    # process; the worker lives on), not only its queued jobs.
    deadline = time.monotonic() + 120
    while not (running := [j for j in started_now() if j.startswith(f"{busy.json()['id']}-fold")]):
        assert time.monotonic() < deadline, "no fold of the busy submission started"
        time.sleep(0.05)
    canceled = stack.client().delete(f"/v1/submissions/{busy.json()['id']}")
    assert canceled.status == 200, canceled.text
    deadline = time.monotonic() + 30
    while Job.fetch(running[0], connection=redis, serializer=JSONSerializer).get_status() != JobStatus.STOPPED:
        assert time.monotonic() < deadline, Job.fetch(running[0], connection=redis, serializer=JSONSerializer) \
            .get_status()
        time.sleep(0.05)

    # The checker never ran a fold: every fold job that ran names the fold worker.
    for sub in accepted:
        assert stack.wait_for(sub.json()["id"])["state"] == "succeeded"
    assert stack.workers[0].poll() is None  # the fold worker survived the stop
    ids = [i for s in accepted for i in (folds_job_id(s.json()["id"]),
                                         *(fold_job_id(s.json()["id"], 0, f) for f in range(5)))]
    jobs = Job.fetch_many(ids, connection=redis, serializer=JSONSerializer)
    assert all(j is None or j.worker_name in (None, "checked-0") for j in jobs)
