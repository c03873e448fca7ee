"""A job running every fold of a small table's submission: the same fold records as a job per fold, each
fold under the fold timeout of its own, and a retried job resumes at the first fold not recorded."""

from __future__ import annotations

import dataclasses
import signal
import time
from typing import Any

import pytest
from rq.timeouts import JobTimeoutException, UnixSignalDeathPenalty
from sklearn.dummy import DummyRegressor
from sklearn.model_selection import cross_validate

from service.records import submissions
from tests.support.folds import REGRESSION_SCORING, SIGN, ridge_diabetes_submission, ridge_on_diabetes
from worker import jobs
from worker.jobs import runtime
from worker.jobs.failure import fold_bound
from worker.jobs.runtime import WorkerContext

FIVE = [[0, f] for f in range(5)]
# What differs between two runs of one fold: the clock.
TIMES = ("finished_at", "fit_seconds", "score_seconds")


def without_times(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    return [{k: v for k, v in r.items() if k not in (*TIMES, "submission_id")} for r in rows]


def test_one_job_records_the_folds_a_job_per_fold_records(ctx: WorkerContext) -> None:
    # Reference: scikit-learn's cross_validate on the vault's folds (KFold(5, shuffle=True, random_state=11)),
    # through ridge_on_diabetes, which runs a job per fold.
    per_fold_sub, per_fold, reference, _, (X, y, cv) = ridge_on_diabetes(ctx)
    sub = ridge_diabetes_submission(ctx)
    answer = jobs.run_folds(sub, FIVE)
    assert [(a["repeat"], a["fold"], a["status"], a["stored"]) for a in answer["folds"]] == [
        (0, f, "ok", True) for f in range(5)]
    together = submissions.fold_rows(ctx.engine, sub)
    assert without_times(together) == without_times(per_fold)
    # Then it does the summary job's work: the same summary a summary job stores.
    assert answer["summary"] == {"submission_id": sub, "folds_ok": 5, "folds_failed": 0}
    jobs.summarize(per_fold_sub)
    summaries = [submissions.get(ctx.engine, s)["cv_summary"] for s in (sub, per_fold_sub)]  # type: ignore[index]
    assert summaries[0]["summary"] == summaries[1]["summary"] and summaries[0]["summary"]["rmse"]["mean"] > 0
    baseline = cross_validate(DummyRegressor(strategy="mean"), X, y, cv=cv, scoring=REGRESSION_SCORING)
    for k, row in enumerate(together):
        for name in REGRESSION_SCORING:
            assert row["scores"][name] == pytest.approx(SIGN[name] * reference[f"test_{name}"][k], rel=1e-10)
            assert row["baseline_scores"][name] == pytest.approx(SIGN[name] * baseline[f"test_{name}"][k],
                                                                 rel=1e-10)


def test_a_retried_job_runs_only_the_folds_not_recorded(ctx: WorkerContext) -> None:
    sub = ridge_diabetes_submission(ctx)
    jobs.run_fold(sub, 0, 1)  # the attempt before was lost after its second fold
    jobs.run_fold(sub, 0, 0)
    first = {(r["repeat"], r["fold"]): r["finished_at"] for r in submissions.fold_rows(ctx.engine, sub)}
    answer = jobs.run_folds(sub, FIVE)
    assert [(a["repeat"], a["fold"]) for a in answer["folds"]] == [(0, 2), (0, 3), (0, 4)]
    rows = submissions.fold_rows(ctx.engine, sub)
    assert [(r["repeat"], r["fold"]) for r in rows] == [(0, f) for f in range(5)]
    kept = {(r["repeat"], r["fold"]): r["finished_at"] for r in rows}
    assert {cell: kept[cell] for cell in first} == first  # not run again


def test_a_job_stops_at_a_submission_that_ended(ctx: WorkerContext) -> None:
    sub = ridge_diabetes_submission(ctx)
    jobs.run_fold(sub, 0, 0)
    assert submissions.transition(ctx.engine, sub, "canceled", ("queued", "running"))
    answer = jobs.run_folds(sub, FIVE)
    assert answer["folds"] == [{"submission_id": sub, "repeat": 0, "fold": 1, "skipped": "canceled"}]
    assert [(r["repeat"], r["fold"]) for r in submissions.fold_rows(ctx.engine, sub)] == [(0, 0)]


@pytest.fixture
def one_second(ctx: WorkerContext) -> WorkerContext:
    """The context with a fold timeout of 1 s."""
    short = WorkerContext(settings=dataclasses.replace(ctx.settings, fold_timeout_seconds=1), engine=ctx.engine)
    runtime.install(short)
    return short


def slow_folds(monkeypatch: pytest.MonkeyPatch, seconds: dict[int, float]) -> None:
    """Make fold ``f`` take ``seconds[f]`` longer than its fit."""
    real = jobs._run_fold

    def slow(ctx: WorkerContext, submission_id: str, repeat: int, fold: int) -> dict[str, Any]:
        time.sleep(seconds.get(fold, 0.0))
        return real(ctx, submission_id, repeat, fold)
    monkeypatch.setattr(jobs, "_run_fold", slow)


def test_each_fold_has_a_fold_timeout_of_its_own(one_second: WorkerContext, monkeypatch: pytest.MonkeyPatch) -> None:
    sub = ridge_diabetes_submission(one_second)
    slow_folds(monkeypatch, {f: 0.6 for f in range(5)})  # 3 s in all, each fold well within 1 s
    answer = jobs.run_folds(sub, FIVE)
    assert [a["status"] for a in answer["folds"]] == ["ok"] * 5


def test_a_fold_over_the_fold_timeout_fails_the_submission_naming_that_fold(
    one_second: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    sub = ridge_diabetes_submission(one_second)
    slow_folds(monkeypatch, {2: 3.0})
    started = time.monotonic()
    with pytest.raises(JobTimeoutException):
        jobs.run_folds(sub, FIVE)
    assert time.monotonic() - started < 2.5  # stopped at its 1 s, not at the end of its 3 s
    row = submissions.get(one_second.engine, sub)
    assert row is not None and row["state"] == "failed" and row["failure_cause"] == "timeout"
    assert row["error"] == "fold 2 of repeat 0 exceeded the fold timeout of 1 s"
    assert [(r["repeat"], r["fold"]) for r in submissions.fold_rows(one_second.engine, sub)] == [(0, 0), (0, 1)]


def test_the_jobs_own_timeout_is_put_back_after_each_fold() -> None:
    # What a worker runs the job under: RQ's alarm for the whole job (here 30 s).
    job_penalty = UnixSignalDeathPenalty(30, JobTimeoutException)
    with job_penalty:
        with fold_bound(1):
            assert 0 < signal.alarm(1) <= 1  # the fold's own alarm is the one set meanwhile
        left = signal.alarm(0)
        assert 28 <= left <= 30, left  # then the job's, less the time spent
        assert signal.getsignal(signal.SIGALRM) == job_penalty.handle_death_penalty
        signal.alarm(left)
