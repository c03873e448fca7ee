"""Identical configurations sent at once: exactly one submission, one chain of jobs, one holdout query.

50 identical POSTs without an Idempotency-Key, from 50 threads released together, against the real
app served by waitress (16 request threads) on SQLite and on PostgreSQL. The configuration check
(a worker's answer in production) sleeps a little here, so that every request has passed the
"already submitted?" lookup before the first one inserts: only the records' unique key can then
keep the copies out.
"""

from __future__ import annotations

import dataclasses
import json
import threading
import time
import urllib.request
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from redis import Redis
from sqlalchemy import func, select

from service.app import create_app
from service.records.keys import create_key
from service.records.tables import submissions as submissions_table
from service.settings import Settings
from service.submission import dispatch, team_queues
from tests.support.api import submission_body
from tests.support.datasets import csv_bytes, diabetes_frame
from tests.support.records import upgraded_engine
from tests.support.servers import ServedApp, postgres_database

COPIES = 50


@dataclasses.dataclass
class Served:
    url: str
    token: str
    settings: Settings
    engine: Any
    dataset: dict[str, Any]


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def served(request: pytest.FixtureRequest, tmp_path: Path, redis_url: str,
           monkeypatch: pytest.MonkeyPatch) -> Iterator[Served]:
    """The real app on SQLite or a throwaway PostgreSQL database, a real Redis, a registered diabetes table."""

    def slow_check(redis: Any, settings: Any, config_doc: dict[str, Any], dataset_id: str) -> dict[str, Any]:
        time.sleep(0.2)  # a worker's answer takes a moment; every copy passes the lookup meanwhile
        return {"ok": True, "has_proba": False, "linear": True}

    monkeypatch.setattr(dispatch, "check_config_remote", slow_check)
    if request.param == "sqlite":
        yield from _serve(tmp_path, redis_url, "")
    else:
        with postgres_database() as url:
            yield from _serve(tmp_path, redis_url, url)


def _serve(root: Path, redis_url: str, database_url: str) -> Iterator[Served]:
    overrides = {"data_dir": root / "data", "database_url": database_url, "redis_url": redis_url,
                 "queue_name": f"concurrent-{uuid.uuid4().hex[:10]}", "min_rows": 50}
    settings = Settings.load(overrides, environ={})
    upgraded_engine(settings).dispose()
    app = create_app(overrides)
    engine = app.extensions["sealfold"].engine
    _info, steward = create_key(engine, "fleet", "steward", "steward")
    _info, submitter = create_key(engine, "fleet", "submitter", "submitter")
    client = app.test_client()
    import io
    reply = client.post("/v1/datasets", headers={"Authorization": f"Bearer {steward}"},
                        content_type="multipart/form-data",
                        data={"file": (io.BytesIO(csv_bytes(diabetes_frame())), "data.csv"), "name": "diabetes",
                              "target": "target", "task": "regression"})
    assert reply.status_code == 201, reply.get_data(as_text=True)
    try:
        with ServedApp(app, threads=16) as server:
            yield Served(server.url, submitter, settings, engine, reply.get_json())
    finally:
        engine.dispose()


def _post_at_once(served: Served, body: dict[str, Any]) -> list[tuple[int, dict[str, Any]]]:
    start = threading.Barrier(COPIES)
    answers: list[tuple[int, dict[str, Any]]] = []
    lock = threading.Lock()

    def post() -> None:
        request = urllib.request.Request(
            f"{served.url}/v1/submissions", data=json.dumps(body).encode(), method="POST",
            headers={"Authorization": f"Bearer {served.token}", "Content-Type": "application/json"})
        start.wait()
        with urllib.request.urlopen(request, timeout=120) as reply:
            answer = (reply.status, json.loads(reply.read()))
        with lock:
            answers.append(answer)

    threads = [threading.Thread(target=post) for _ in range(COPIES)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=180)
    return answers


@pytest.mark.timeout(300)
def test_fifty_identical_posts_make_one_submission_and_one_chain(served: Served, redis_url: str) -> None:
    answers = _post_at_once(served, submission_body(served.dataset))
    assert len(answers) == COPIES
    assert {status for status, _ in answers} <= {200, 202}
    ids = {doc["id"] for _, doc in answers}
    assert len(ids) == 1, f"{len(ids)} submissions from {COPIES} identical requests"
    assert sum(1 for status, _ in answers if status == 202) == 1  # created once; the rest return it
    with served.engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(submissions_table)).scalar_one() == 1
    # One chain of jobs, hence one holdout job and at most one holdout query to spend budget on.
    queues = team_queues.work_queues(Redis.from_url(redis_url), served.settings)
    job_ids = {j for queue in queues for j in [*queue.job_ids, *queue.deferred_job_registry.get_job_ids()]}
    (sub_id,) = ids
    assert {j.split("-")[0] for j in job_ids} == {sub_id}
    assert sum(1 for j in job_ids if j.endswith("-holdout")) == 1
