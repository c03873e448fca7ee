"""A holdout work horse killed after it opened the seal spends the attempt: one counted query, fixed words.

Real stack (own redis-server, one real forking worker, SQLite records). Data: scikit-learn's
make_regression; a brute-force cosine KNeighborsRegressor makes predicting the sealed rows take about a
second, long enough to kill the horse while it holds them. Whether such a process dies (the OOM killer,
a segfault, the memory limit) can depend on the sealed rows, so the kill is answered like a failed
attempt, never by scoring again.
"""

from __future__ import annotations

import json
import os
import signal
import time
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest
from redis import Redis
from rq.job import Job
from rq.serializers import JSONSerializer
from sklearn.datasets import make_regression
from sqlalchemy import select

from service.gate.release import FAILED_NOTE
from service.records import holdout_releases, submissions
from service.records.tables import holdout_claims
from service.submission.dispatch import holdout_job_id
from tests.support.datasets import register
from tests.support.servers import redis_server
from tests.support.stack import Stack, running_stack
from worker.jobs.holdout import LOST_AFTER_SEAL

pytestmark = pytest.mark.slow


@pytest.fixture
def one_worker(tmp_path: Path) -> Iterator[Stack]:
    with redis_server(tmp_path) as url, running_stack(tmp_path / "data", url, "crash", workers=1) as live:
        yield live


def _children(pid: int) -> set[int]:
    return {int(c) for c in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()}


def _opened(stack: Stack, sub_id: str) -> bool:
    with stack.engine.connect() as conn:
        opened = conn.execute(select(holdout_claims.c.opened_at)
                              .where(holdout_claims.c.submission_id == sub_id)).scalar_one_or_none()
    return opened is not None


def test_a_holdout_horse_killed_on_the_sealed_rows_is_one_counted_failure(one_worker: Stack) -> None:
    stack = one_worker
    X, y = make_regression(n_samples=10000, n_features=8, noise=1.0, random_state=5)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(8)]).assign(y=y)
    ds = register(stack.client("steward"), frame, name="killed-holdout", target="y", task="regression")
    worker = stack.workers[0]
    idle = _children(worker.pid)  # the fold process
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": ds["id"], "model": {"estimator": "KNeighborsRegressor",
                                       "params": {"algorithm": "brute", "metric": "cosine"}}})
    assert reply.status == 202, reply.text
    sub_id = str(reply.json()["id"])
    deadline = time.monotonic() + 120
    while not _opened(stack, sub_id):  # the horse has met the sealed rows
        assert time.monotonic() < deadline, stack.log_path.read_text(errors="replace")[-3000:]
        time.sleep(0.01)
    horses = _children(worker.pid) - idle
    assert len(horses) == 1 and submissions.get_holdout(stack.engine, sub_id) is None
    os.kill(horses.pop(), signal.SIGKILL)

    doc = stack.wait_for(sub_id, timeout=180)
    assert doc["state"] == "succeeded", doc
    assert doc["failure_cause"] is None and doc["error"] is None
    assert doc["result"]["holdout"]["note"] == FAILED_NOTE
    assert "signal" not in json.dumps(doc)  # how it ended stays with the operators
    stored = submissions.get_holdout(stack.engine, sub_id)
    assert stored is not None and stored["scores"] == {}
    assert stored["error"].startswith(LOST_AFTER_SEAL) and "signal 9" in stored["error"], stored["error"]
    release = holdout_releases.get(stack.engine, sub_id)
    assert release is not None and release["spent"] == 1 and release["outcome"] == "failed"
    # RQ retried the job; the retry read the stored outcome instead of meeting the sealed rows again.
    job = Job.fetch(holdout_job_id(sub_id), connection=Redis.from_url(stack.settings.redis_url),
                    serializer=JSONSerializer)
    assert job.return_value() == {"submission_id": sub_id, "holdout": "already scored"}
