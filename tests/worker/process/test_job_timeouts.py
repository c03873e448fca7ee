"""One timeout setting: a worker runs each job under its own settings' timeout, whatever the enqueuer wrote."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import fakeredis
import pytest
from rq import Queue
from rq.serializers import JSONSerializer

from service.settings import Settings
from worker.process import main
from worker.process.main import build_worker


def test_the_settings_give_each_job_kind_its_timeout() -> None:
    settings = Settings.load({"fold_timeout_seconds": 120, "check_timeout_seconds": 20.0}, environ={})
    assert [settings.job_timeout_seconds(k) for k in ("fold", "holdout", "check", "summary", "verdict")] == [
        120, 240, 60, 600, 600]


@pytest.mark.parametrize(("func", "args", "expected"), [
    ("run_fold", ("sub_x", 0, 1), 7), ("score_holdout", ("sub_x",), 14), ("summarize", ("sub_x",), 600),
    # A job running several folds one after another: a fold timeout for each of them.
    ("run_folds", ("sub_x", [[0, 0], [0, 1], [0, 2]]), 21),
])
def test_a_worker_applies_its_own_timeout(func: str, args: tuple[Any, ...], expected: int, tmp_path: Path,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    settings = Settings.load({"data_dir": tmp_path, "fold_timeout_seconds": 7}, environ={})
    redis = fakeredis.FakeRedis()
    worker = build_worker(settings, redis)
    job = Queue(settings.queue_name, connection=redis, serializer=JSONSerializer).enqueue_call(
        f"worker.jobs.{func}", args=args, timeout=3600)  # what an API with other settings wrote
    seen: dict[str, Any] = {}
    monkeypatch.setattr(main.SealfoldWorker, "_execute", lambda self, j, q: seen.update(timeout=j.timeout))
    worker.execute_job(job, Queue(settings.queue_name, connection=redis, serializer=JSONSerializer))
    assert seen["timeout"] == expected
