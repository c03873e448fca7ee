"""The job functions RQ runs, enqueued by dotted name (``worker.jobs.run_fold`` ...).

Arguments and return values are plain JSON; engine and settings come from ``worker.jobs.runtime``.
``ALLOWED_JOBS`` is the whole list a sealfold worker agrees to run.
"""

from __future__ import annotations

from typing import Any

from rq import get_current_job

from service.records import submissions
from worker.jobs import champion_fold, check, holdout, summary, verdict
from worker.jobs.early_verdict import judge_if_last
from worker.jobs.failure import classify, fold_bound, handle_lost_work
from worker.jobs.fold import run_fold as _run_fold
from worker.jobs.runtime import current, fold_runner


def check_config(config_doc: dict[str, Any], dataset_id: str) -> dict[str, Any]:
    """Validate a configuration document against scikit-learn and the service caps."""
    return check.check_config(current(), config_doc, dataset_id)


def run_fold(submission_id: str, repeat: int, fold: int) -> dict[str, Any]:
    """Fit and score one fold of a submission, with its baseline, and record it.

    In a started worker the fold process does the work (``worker.process.fold_process``). The
    estimator's own error is recorded as the fold's result; anything else that stops the fold is lost
    work (``worker.jobs.failure``): retried, or the submission fails naming the cause.
    """
    ctx = current()
    try:
        runner = fold_runner()
        if runner is not None:
            return runner.run_fold(submission_id, repeat, fold)
        return _run_fold(ctx, submission_id, repeat, fold)
    except Exception as exc:
        loss = classify(exc, f"fold {fold} of repeat {repeat}", ctx.settings.fold_timeout_seconds,
                        ctx.settings.memory_limit_mib)
        handle_lost_work(ctx, get_current_job(), submission_id, loss)
        raise


def run_folds(submission_id: str, cells: list[list[int]]) -> dict[str, Any]:
    """Run several folds of a submission one after another, each as ``run_fold`` does (a small table's,
    ``service.submission.dispatch.folds_together``).

    Each fold gets a whole fold timeout of its own (``fold_bound``), so a fold is bounded as in a job of its
    own. A fold an earlier attempt of this job recorded is not run again; a fold whose work is lost ends the
    job the way ``run_fold`` ends it (retried, or the submission fails naming that fold). Then it does the
    summary job's work, in its place.
    """
    ctx = current()
    recorded = submissions.recorded_cells(ctx.engine, submission_id)
    answers: list[dict[str, Any]] = []
    for repeat, fold in cells:
        if (repeat, fold) in recorded:
            continue
        with fold_bound(ctx.settings.fold_timeout_seconds):
            answer = run_fold(submission_id, repeat, fold)
        answers.append(answer)
        if "skipped" in answer:  # the submission ended meanwhile: so do the folds left
            return {"submission_id": submission_id, "folds": answers}
    # Every fold is recorded: the job summarises them itself (no summary job waits on it), and gives the
    # verdict when the holdout job has ended too.
    job = get_current_job()
    summarized = summary.summarize(ctx, submission_id, job.connection if job is not None else None)
    if job is not None:
        judge_if_last(ctx, job.connection, job.id, submission_id)
    return {"submission_id": submission_id, "folds": answers, "summary": summarized}


def run_champion_fold(submission_id: str, champion_id: str, repeat: int, fold: int) -> dict[str, Any]:
    """Score the champion's configuration on one fold of the submission's plan (cached per plan)."""
    return champion_fold.run_champion_fold(current(), submission_id, champion_id, repeat, fold)


def summarize(submission_id: str) -> dict[str, Any]:
    """Summarise a submission's folds (fan-in) and store the summary."""
    job = get_current_job()
    answer = summary.summarize(current(), submission_id, job.connection if job is not None else None)
    if job is not None:
        judge_if_last(current(), job.connection, job.id, submission_id)
    return answer


def score_holdout(submission_id: str) -> dict[str, Any]:
    """Score a submission on the sealed holdout, exactly once.

    It runs in a work horse under the memory limit (``worker.process.main``). What stops the job other
    than the estimator's own error is lost work, as for a fold.
    """
    ctx = current()
    try:
        answer = holdout.score_holdout(ctx, submission_id)
    except Exception as exc:
        loss = classify(exc, "the holdout refit and scoring", ctx.settings.fold_timeout_seconds * 2,
                        ctx.settings.memory_limit_mib, sealed=True)
        handle_lost_work(ctx, get_current_job(), submission_id, loss)
        raise
    job = get_current_job()
    if job is not None:  # the holdout step's watch has ended: this is the verdict's own work
        judge_if_last(ctx, job.connection, job.id, submission_id)
    return answer


def give_verdict(submission_id: str) -> dict[str, Any]:
    """Release the holdout figure under the dataset's policy and store the verdict."""
    job = get_current_job()
    if job is None:
        raise RuntimeError("worker.jobs.give_verdict runs inside an RQ job; it needs the job's Redis connection")
    return verdict.give_verdict(current(), job.connection, submission_id)


# The dotted names a sealfold worker agrees to run; nothing else in Redis is ever imported.
ALLOWED_JOBS: frozenset[str] = frozenset(
    f"{__name__}.{job.__name__}" for job in (check_config, run_fold, run_folds, run_champion_fold, summarize,
                                              score_holdout, give_verdict)
)
