"""One computation per submission: two holdout jobs at once refit and score once, the other reads the outcome.

The data is scikit-learn's bundled diabetes table (Efron et al. 2004); what is counted is how often the
holdout job builds and fits its model, and how often it writes the per-example loss file.
"""

from __future__ import annotations

import stat
import threading
import time
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_diabetes
from sqlalchemy import update

from service.records import holdout_claims, submissions
from service.records.engine import utcnow
from service.records.tables import holdout_claims as claims_table
from service.settings import Settings
from service.vault import store
from tests.support.records import upgraded_engine
from tests.support.servers import postgres_database
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs import holdout, losses, runtime
from worker.jobs.runtime import WorkerContext


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def any_ctx(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[WorkerContext]:
    """A worker context whose records live in SQLite or in a throwaway PostgreSQL database."""
    if request.param == "sqlite":
        yield from _context(tmp_path, "")
    else:
        with postgres_database() as url:
            yield from _context(tmp_path, url)


def _context(data_dir: Path, url: str) -> Iterator[WorkerContext]:
    settings = Settings.load({"data_dir": data_dir, "database_url": url}, environ={})
    context = WorkerContext(settings=settings, engine=upgraded_engine(settings))
    runtime.install(context)
    yield context
    runtime.uninstall()
    context.engine.dispose()


class Counted:
    """Counts the holdout job's refits and loss-file writes; each refit takes ``pause`` seconds longer."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch, pause: float) -> None:
        self.refits = 0
        self.writes = 0
        self._lock = threading.Lock()
        real_build, real_save = holdout.build_model, holdout.save_per_example

        def build(*args: Any, **kwargs: Any) -> Any:
            with self._lock:
                self.refits += 1
            time.sleep(pause)  # keeps the first job busy while the second arrives
            return real_build(*args, **kwargs)

        def save(*args: Any, **kwargs: Any) -> None:
            with self._lock:
                self.writes += 1
            real_save(*args, **kwargs)

        monkeypatch.setattr(holdout, "build_model", build)
        monkeypatch.setattr(holdout, "save_per_example", save)
        monkeypatch.setattr(holdout, "POLL_SECONDS", 0.05)


def _submission(ctx: WorkerContext) -> tuple[str, dict[str, Any]]:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    config = config_document(dataset, "Ridge", params={"alpha": 0.7}, metrics=["rmse", "r2"])
    return add_submission(ctx, dataset, config), dataset


def _at_once(ctx: WorkerContext, sub_id: str, jobs: int = 2) -> list[dict[str, Any]]:
    """Run ``jobs`` holdout jobs for one submission in threads released together; return their answers."""
    start = threading.Barrier(jobs)
    answers: list[dict[str, Any]] = []
    failures: list[BaseException] = []

    def run() -> None:
        start.wait()
        try:
            answers.append(holdout.score_holdout(ctx, sub_id))
        except BaseException as exc:  # surfaced below
            failures.append(exc)

    threads = [threading.Thread(target=run) for _ in range(jobs)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=120)
    assert not failures, failures
    return answers


def test_two_holdout_jobs_at_once_compute_once(any_ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    counted = Counted(monkeypatch, pause=0.3)
    for attempt in range(3):
        sub_id, _ = _submission(any_ctx)
        answers = _at_once(any_ctx, sub_id)
        assert sorted(a["holdout"] for a in answers) == ["already scored", "scored"], answers
        assert (counted.refits, counted.writes) == (attempt + 1, attempt + 1)
        stored = submissions.get_holdout(any_ctx.engine, sub_id)
        assert stored is not None and set(stored["scores"]) == {"rmse", "r2"}


def test_a_live_claim_is_waited_for_and_its_outcome_read(ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    counted = Counted(monkeypatch, pause=0.0)
    sub_id, dataset = _submission(ctx)
    assert holdout_claims.claim(ctx.engine, sub_id, "claim_elsewhere", timedelta(seconds=120))
    answers: list[dict[str, Any]] = []
    waiting = threading.Thread(target=lambda: answers.append(holdout.score_holdout(ctx, sub_id)))
    waiting.start()
    time.sleep(0.3)
    assert waiting.is_alive() and counted.refits == 0  # it waits rather than computing
    submissions.store_holdout_once(ctx.engine, sub_id, {"rmse": 50.0, "r2": 0.5}, dataset["holdout_fingerprint"], 0.1)
    waiting.join(timeout=30)
    assert answers == [{"submission_id": sub_id, "holdout": "already scored"}]
    assert (counted.refits, counted.writes) == (0, 0)


def test_a_claim_whose_heartbeat_stopped_is_taken_over(ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    counted = Counted(monkeypatch, pause=0.0)
    sub_id, _ = _submission(ctx)
    assert holdout_claims.claim(ctx.engine, sub_id, "claim_dead", timedelta(seconds=120))
    with ctx.engine.begin() as conn:  # the job that held it died 10 minutes ago
        conn.execute(update(claims_table).values(heartbeat_at=utcnow() - timedelta(minutes=10)))
    assert holdout.score_holdout(ctx, sub_id)["holdout"] == "scored"
    assert (counted.refits, counted.writes) == (1, 1)
    assert not holdout_claims.beat(ctx.engine, sub_id, "claim_dead")  # the dead job's claim is gone


def test_a_job_whose_claim_was_taken_over_does_not_open_the_seal(
    ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    sub_id, _ = _submission(ctx)
    real_build = holdout.build_model
    opened: list[str] = []
    real_open = store.open_sealed_holdout

    def stalled(*args: Any, **kwargs: Any) -> Any:
        # While this job refits, it stalls past the stale limit and another job takes the claim over.
        with ctx.engine.begin() as conn:
            conn.execute(update(claims_table).values(token="claim_successor"))
        return real_build(*args, **kwargs)

    monkeypatch.setattr(holdout, "build_model", stalled)
    monkeypatch.setattr(store, "open_sealed_holdout", lambda *a, **k: opened.append(a[1]) or real_open(*a, **k))
    assert holdout.score_holdout(ctx, sub_id) == {"submission_id": sub_id, "holdout": "claim lost"}
    assert opened == [] and submissions.get_holdout(ctx.engine, sub_id) is None


def test_the_heartbeat_keeps_a_long_computation_claimed(ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    # The computation lasts longer than the stale limit; only the heartbeat keeps the second job waiting.
    monkeypatch.setattr(holdout, "CLAIM_STALE_SECONDS", 1.0)
    monkeypatch.setattr(holdout, "HEARTBEAT_SECONDS", 0.1)
    counted = Counted(monkeypatch, pause=2.5)
    sub_id, _ = _submission(ctx)
    answers = _at_once(ctx, sub_id)
    assert sorted(a["holdout"] for a in answers) == ["already scored", "scored"]
    assert (counted.refits, counted.writes) == (1, 1)


def test_the_loss_file_is_sealed_and_written_whole(ctx: WorkerContext) -> None:
    sub_id, dataset = _submission(ctx)
    assert holdout.score_holdout(ctx, sub_id)["holdout"] == "scored"
    folder = store.dataset_paths(ctx.settings, dataset["id"]).sealed_holdout.parent / "per_example"
    assert [p.name for p in folder.iterdir()] == [f"{sub_id}.npz"]  # no temporary file left behind
    assert stat.S_IMODE(folder.stat().st_mode) == 0o700
    assert stat.S_IMODE((folder / f"{sub_id}.npz").stat().st_mode) == 0o600
    # Writers racing on one submission's file never share a temporary name: each rename is whole.
    values = [{"rmse": np.full(42, float(i))} for i in range(2)]
    failures: list[BaseException] = []

    def write(which: int) -> None:
        try:
            for _ in range(25):
                losses.save_per_example(ctx.settings, dataset["id"], sub_id, values[which])
        except BaseException as exc:  # surfaced below
            failures.append(exc)

    threads = [threading.Thread(target=write, args=(i,)) for i in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert not failures, failures
    kept = losses.load_per_example(ctx.settings, dataset["id"], sub_id, "rmse")
    assert kept is not None and float(kept[0]) in (0.0, 1.0) and np.all(kept == kept[0])
    assert [p.name for p in folder.iterdir()] == [f"{sub_id}.npz"]


def test_two_jobs_at_once_on_a_pipeline_that_fails_on_the_seal_store_one_failure(
    any_ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A failed attempt is a counted query as much as a score: it must be computed, and stored, once.
    counted = Counted(monkeypatch, pause=0.3)
    frame = load_diabetes(as_frame=True).frame
    frame["depot"] = pd.Series(np.where(frame["sex"] > 0, "north", "south"), dtype="str")
    dev, hold = frame.iloc[:400].copy(), frame.iloc[400:].copy()
    hold.loc[hold.index[0], "depot"] = "depot-only-sealed"
    dataset = add_dataset(any_ctx, dev, hold, "target", "regression", folds=3)
    for attempt in range(3):
        config = config_document(dataset, "Ridge", params={"alpha": 0.5 + attempt}, features=["depot", "age"],
                                 preprocess=[{"transformer": "OneHotEncoder", "columns": ["depot"]}])
        sub_id = add_submission(any_ctx, dataset, config)
        answers = _at_once(any_ctx, sub_id)
        assert sorted(a["holdout"] for a in answers) == ["already scored", "not scored"], answers
        assert counted.refits == attempt + 1 and counted.writes == 0
        stored = submissions.get_holdout(any_ctx.engine, sub_id)
        assert stored is not None and stored["scores"] == {} and "ValueError" in stored["error"]
