"""The holdout attempt is spent once the pipeline meets the sealed rows: what ends it is a counted failure.

A crash, a kill, the holdout timeout or the memory limit after the seal is opened can depend on the sealed
rows, so it is stored as the one failed outcome (the verdict job releases it as one query, in the fixed
words of ``service.gate.release.FAILED_NOTE``) and never computed again; before the seal is opened nothing
sealed was touched, and a loss is retried uncounted. Data: scikit-learn's bundled diabetes table
(Efron et al. 2004). The bounds are raised at the boundary (MemoryError, RQ's JobTimeoutException) where
a real bound would raise them; tests/e2e/test_holdout_crash.py kills a real work horse.
"""

from __future__ import annotations

import json
from datetime import timedelta
from typing import Any

import pytest
from redis import Redis
from rq.timeouts import JobTimeoutException
from sklearn.datasets import load_diabetes
from sqlalchemy import update

from service.gate.release import FAILED_NOTE
from service.records import holdout_claims, holdout_releases, submissions
from service.records.engine import utcnow
from service.records.tables import holdout_claims as claims_table
from service.submission.document import submission_document
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs import holdout, runtime
from worker.jobs.runtime import WorkerContext
from worker.jobs.verdict import give_verdict


def _submission(ctx: WorkerContext) -> tuple[str, dict[str, Any]]:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    config = config_document(dataset, "Ridge", params={"alpha": 0.7}, metrics=["rmse", "r2"])
    return add_submission(ctx, dataset, config), dataset


def _finish(ctx: WorkerContext, redis_url: str, sub_id: str) -> dict[str, Any]:
    """Run the folds, the summary and the verdict, and return the document the submitter reads."""
    for f in range(3):
        jobs.run_fold(sub_id, 0, f)
    jobs.summarize(sub_id)
    give_verdict(ctx, Redis.from_url(redis_url), sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    return submission_document(ctx.engine, sub)


def _bound_on_the_seal(monkeypatch: pytest.MonkeyPatch, exc: BaseException) -> list[int]:
    """Make predicting on the sealed rows raise ``exc``, as a bound reached there would; count the calls."""
    calls: list[int] = []

    def bounded(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        raise exc

    monkeypatch.setattr(holdout, "predictions", bounded)
    return calls


@pytest.mark.parametrize(("exc", "operators_read"), [
    (MemoryError(), "the memory limit of"),
    (JobTimeoutException("Task exceeded maximum timeout value (7200 seconds)"), "the holdout timeout of"),
])
def test_a_bound_on_the_sealed_rows_is_one_counted_failure_told_in_fixed_words(
    ctx: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch, exc: BaseException, operators_read: str
) -> None:
    calls = _bound_on_the_seal(monkeypatch, exc)
    sub_id, _ = _submission(ctx)
    assert jobs.score_holdout(sub_id) == {"submission_id": sub_id, "holdout": "not scored"}
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None and stored["scores"] == {}
    assert stored["error"].startswith(holdout.LOST_AFTER_SEAL) and operators_read in stored["error"]
    # A retry or a duplicate reads the outcome: the sealed rows are not met again.
    assert jobs.score_holdout(sub_id)["holdout"] == "already scored" and len(calls) == 1
    doc = _finish(ctx, redis_url, sub_id)
    assert doc["state"] == "succeeded" and doc["failure_cause"] is None and doc["error"] is None
    assert doc["result"]["holdout"]["note"] == FAILED_NOTE
    text = json.dumps(doc).lower()
    assert "memory" not in text and "timeout" not in text  # which bound was hit stays with the operators
    release = holdout_releases.get(ctx.engine, sub_id)
    assert release is not None and release["spent"] == 1 and release["outcome"] == "failed"


def test_a_spent_attempt_whose_job_died_is_stored_failed_and_never_recomputed(
    ctx: WorkerContext, redis_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    refits: list[int] = []
    real_build = holdout.build_model
    monkeypatch.setattr(holdout, "build_model", lambda *a, **k: refits.append(1) or real_build(*a, **k))
    sub_id, _ = _submission(ctx)
    # A job claimed the computation, opened the seal, then died (its heartbeat stopped 10 minutes ago).
    assert holdout_claims.claim(ctx.engine, sub_id, "claim_dead", timedelta(seconds=120))
    assert holdout_claims.open_seal(ctx.engine, sub_id, "claim_dead")
    with ctx.engine.begin() as conn:
        conn.execute(update(claims_table).values(heartbeat_at=utcnow() - timedelta(minutes=10)))
    # Its claim is spent: never taken over, and not given up by its holder either.
    assert not holdout_claims.claim(ctx.engine, sub_id, "claim_next", timedelta(seconds=60))
    holdout_claims.release(ctx.engine, sub_id, "claim_dead")
    assert holdout_claims.is_spent(ctx.engine, sub_id)
    assert holdout.score_holdout(ctx, sub_id) == {"submission_id": sub_id, "holdout": "not scored"}
    assert refits == []
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None and "stopped renewing the claim" in stored["error"]
    doc = _finish(ctx, redis_url, sub_id)
    assert doc["state"] == "succeeded" and doc["result"]["holdout"]["note"] == FAILED_NOTE
    release = holdout_releases.get(ctx.engine, sub_id)
    assert release is not None and release["spent"] == 1


def test_a_spent_attempt_still_beating_is_waited_for(ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    # A live holder past the seal is not declared lost: the other job waits (here: until the holder stores).
    monkeypatch.setattr(holdout, "POLL_SECONDS", 0.05)
    sub_id, dataset = _submission(ctx)
    assert holdout_claims.claim(ctx.engine, sub_id, "claim_live", timedelta(seconds=120))
    assert holdout_claims.open_seal(ctx.engine, sub_id, "claim_live")
    assert not holdout_claims.spent_and_stale(ctx.engine, sub_id, timedelta(seconds=60))
    polls: list[int] = []
    real_sleep = holdout.time.sleep

    def sleep(seconds: float) -> None:
        polls.append(1)
        if len(polls) == 3:  # the live holder stores its score meanwhile
            submissions.store_holdout_once(ctx.engine, sub_id, {"rmse": 55.0, "r2": 0.4},
                                           dataset["holdout_fingerprint"], 0.1)
        real_sleep(seconds)

    monkeypatch.setattr(holdout.time, "sleep", sleep)
    assert holdout.score_holdout(ctx, sub_id)["holdout"] == "already scored"
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None and stored["error"] is None


def test_a_loss_before_the_seal_is_retried_uncounted(ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    # The sealed file could not be fetched (an infrastructure loss): nothing sealed met the pipeline.
    def unreachable(dataset_id: str) -> None:
        raise ConnectionError("the API's internal endpoint did not answer")

    monkeypatch.setattr(runtime, "sealed_file", unreachable)
    sub_id, _ = _submission(ctx)
    with pytest.raises(ConnectionError):
        holdout.score_holdout(ctx, sub_id)
    assert submissions.get_holdout(ctx.engine, sub_id) is None
    assert not holdout_claims.is_spent(ctx.engine, sub_id)
    assert holdout.settle_lost(ctx, sub_id, "a work horse killed")["holdout"] == "not started"
    assert submissions.get_holdout(ctx.engine, sub_id) is None
    monkeypatch.undo()
    assert holdout.score_holdout(ctx, sub_id)["holdout"] == "scored"  # the retry computes it, once
