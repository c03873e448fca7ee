"""The job functions RQ runs, enqueued by dotted name (``worker.jobs.run_fold`` ...).

Arguments and return values are plain JSON; engine and settings come from ``worker.jobs.runtime``.
``ALLOWED_JOBS`` is the whole list a sealfold worker agrees to run.
"""

from __future__ import annotations

from typing import Any

from rq import get_current_job

from worker.jobs import champion_fold, check, holdout, summary, verdict
from worker.jobs.fold import run_fold as _run_fold
from worker.jobs.runtime import current, fold_runner


def check_config(config_doc: dict[str, Any], dataset_id: str) -> dict[str, Any]:
    """Validate a configuration document against scikit-learn and the service caps."""
    return check.check_config(current(), config_doc, dataset_id)


def run_fold(submission_id: str, repeat: int, fold: int) -> dict[str, Any]:
    """Fit and score one fold of a submission, with its baseline, and record it.

    In a started worker the fold process does the work (``worker.process.fold_process``).
    """
    runner = fold_runner()
    if runner is not None:
        return runner.run_fold(submission_id, repeat, fold)
    return _run_fold(current(), submission_id, repeat, fold)


def run_champion_fold(submission_id: str, champion_id: str, repeat: int, fold: int) -> dict[str, Any]:
    """Score the champion's configuration on one fold of the submission's plan (cached per plan)."""
    return champion_fold.run_champion_fold(current(), submission_id, champion_id, repeat, fold)


def summarize(submission_id: str) -> dict[str, Any]:
    """Summarise a submission's folds (fan-in) and store the summary."""
    return summary.summarize(current(), submission_id)


def score_holdout(submission_id: str) -> dict[str, Any]:
    """Score a submission on the sealed holdout, exactly once."""
    return holdout.score_holdout(current(), submission_id)


def give_verdict(submission_id: str) -> dict[str, Any]:
    """Release the holdout figure under the dataset's policy and store the verdict."""
    job = get_current_job()
    if job is None:
        raise RuntimeError("worker.jobs.give_verdict runs inside an RQ job; it needs the job's Redis connection")
    return verdict.give_verdict(current(), job.connection, submission_id)


# The dotted names a sealfold worker agrees to run; nothing else in Redis is ever imported.
ALLOWED_JOBS: frozenset[str] = frozenset(
    f"{__name__}.{job.__name__}" for job in (check_config, run_fold, run_champion_fold, summarize, score_holdout,
                                              give_verdict)
)
