"""The pre-fork warm-up: it runs the job code on invented rows and leaves no trace behind."""

from __future__ import annotations

import gc
import logging
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sklearn.datasets import load_diabetes
from sqlalchemy import QueuePool, func, select

from service.records import submissions
from service.records.tables import metadata
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs import holdout
from worker.jobs.runtime import WorkerContext
from worker.process import warmup


@pytest.fixture(autouse=True)
def unfrozen() -> Iterator[None]:
    yield
    gc.unfreeze()  # the warm-up freezes the heap for forks; the rest of the test session needs none


def _row_counts(ctx: WorkerContext) -> dict[str, int]:
    with ctx.engine.connect() as conn:
        return {t.name: int(conn.execute(select(func.count()).select_from(t)).scalar_one())
                for t in metadata.sorted_tables}


def _files(root: Path) -> list[Path]:
    return sorted(p for p in root.rglob("*") if p.is_file() and not p.name.startswith("records.sqlite3"))


def test_warm_up_changes_no_record_and_no_file(ctx: WorkerContext) -> None:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge"))
    before, files, sub = _row_counts(ctx), _files(ctx.settings.data_dir), submissions.get(ctx.engine, sub_id)

    warmup.warm_up(ctx)

    assert _row_counts(ctx) == before and _files(ctx.settings.data_dir) == files
    assert submissions.get(ctx.engine, sub_id) == sub  # not even updated_at moved
    assert gc.get_freeze_count() > 0  # what is alive now is shared with the horses, never collected there


def test_warm_up_leaves_no_pooled_connection_to_inherit(ctx: WorkerContext) -> None:
    warmup.warm_up(ctx)
    pool = ctx.engine.pool
    assert isinstance(pool, QueuePool) and pool.checkedin() == 0 and pool.checkedout() == 0


def test_a_failing_warm_up_is_logged_not_raised(
    ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    def broken(*_args: Any, **_kwargs: Any) -> None:
        raise RuntimeError("no luck")

    monkeypatch.setattr(warmup, "evaluate_fold", broken)
    with caplog.at_level(logging.WARNING, logger="worker.process.warmup"):
        warmup.warm_up(ctx)
    assert "warm-up failed" in caplog.text


def test_the_holdout_job_compiles_no_statement_after_the_warm_up(ctx: WorkerContext) -> None:
    """Each holdout job runs in a fresh fork: a statement first compiled there is compiled again in every one."""
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge", metrics=("rmse", "r2")))
    cache = ctx.engine._compiled_cache
    assert cache is not None
    cache.clear()  # as in a worker just started: what the set-up above compiled is not there
    warmup.warm_up(ctx)
    before = set(cache.keys())

    answer = holdout.score_holdout(ctx, sub_id)

    assert answer["holdout"] == "scored"
    compiled_here = [str(compiled) for key, compiled in cache.items() if key not in before]
    assert compiled_here == [], "\n".join(compiled_here)
