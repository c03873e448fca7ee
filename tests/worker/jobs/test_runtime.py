"""The jobs' common preamble: the submission and its dataset, or the answer of a job that skips it."""

from __future__ import annotations

import pytest
from sklearn.datasets import load_diabetes

from service.records import submissions
from service.vocabulary import LIVE_STATES, TERMINAL_STATES
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs.runtime import Skip, Work, WorkerContext, submission_to_work_on


def _submission(ctx: WorkerContext) -> tuple[str, str]:
    frame = load_diabetes(as_frame=True).frame  # scikit-learn's bundled diabetes data
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression", folds=3)
    return add_submission(ctx, dataset, config_document(dataset, "Ridge")), str(dataset["id"])


def test_a_live_submission_comes_with_its_dataset(ctx: WorkerContext) -> None:
    sub_id, dataset_id = _submission(ctx)
    work = submission_to_work_on(ctx, sub_id)
    assert isinstance(work, Work)
    assert work.submission["id"] == sub_id and work.dataset["id"] == dataset_id
    assert "holdout_fingerprint" in work.dataset  # the internal row, which the jobs need


def test_an_ended_submission_is_skipped_with_the_jobs_echo(ctx: WorkerContext) -> None:
    sub_id, _ = _submission(ctx)
    assert submissions.transition(ctx.engine, sub_id, "failed", LIVE_STATES, error="x")
    work = submission_to_work_on(ctx, sub_id, echo={"repeat": 1, "fold": 2})
    assert work == Skip({"submission_id": sub_id, "repeat": 1, "fold": 2, "skipped": "failed"})


def test_a_succeeded_submission_is_skipped_only_when_asked(ctx: WorkerContext) -> None:
    sub_id, _ = _submission(ctx)
    assert submissions.transition(ctx.engine, sub_id, "succeeded", LIVE_STATES)
    assert isinstance(submission_to_work_on(ctx, sub_id), Work)  # holdout and verdict answer it themselves
    skipped = submission_to_work_on(ctx, sub_id, skip=TERMINAL_STATES)
    assert skipped == Skip({"submission_id": sub_id, "skipped": "succeeded"})


def test_an_unknown_submission_is_an_error_the_job_retries(ctx: WorkerContext) -> None:
    with pytest.raises(LookupError, match="sub_nope"):
        submission_to_work_on(ctx, "sub_nope")
