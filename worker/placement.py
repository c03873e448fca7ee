"""Decide where a job runs: in the worker's own process, or in a forked work horse.

A fork of the worker (some 150 MB of preloaded libraries), the horse's first touch of the pages it
inherited, a fresh records-DB connection and the horse's exit cost 30-60 ms per job on a 2-core
machine -- several times the whole work of a fold on a table of a few thousand rows, and paid again
at every one of a submission's jobs. So these run in the worker's own process:

- the configuration check, the summary and the verdict, always: they read no rows and fit nothing
  (parameter validation with one dataset row read; arithmetic and statistics on stored figures);
- a fold job whose development rows x features is at most ``Settings.inline_fold_cells``, when the
  configuration has no nested search and no learning curve (those multiply the fits of one job).

Everything else forks: fold jobs on bigger tables, where a horse costs little beside the fit and
where its isolation pays (RQ kills a horse that outlives its timeout, even inside a long C call; a
horse's memory goes back to the system when it exits), and always the holdout job, so the sealed
rows are only ever read in a process that ends with the job.

What an in-process job may rely on, and why that is safe: nothing it makes outlives it (each job
builds its own objects; the catalog is read-only); its records-DB connection goes back to this
process's pool, which every horse replaces on fork (``runtime.after_fork``); RQ's timeout still
applies (SIGALRM, as in RQ's SimpleWorker); and the worker keeps the job's heartbeat going from a
thread while it runs, so a job of a killed worker is declared abandoned and retried exactly as a
horse's is. The choice reads only the allow-listed function name and the records DB; a job whose
data does not even decode, or whose submission cannot be read, goes to a horse, which fails it as
before.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from service.records import datasets, submissions
from worker.jobs import check_config, judge, run_fold, summarize
from worker.runtime import WorkerContext


def _dotted(job: Any) -> str:
    return f"{job.__module__}.{job.__name__}"


ALWAYS_IN_PROCESS: frozenset[str] = frozenset(_dotted(job) for job in (check_config, summarize, judge))
FOLD_JOB = _dotted(run_fold)


def runs_in_process(ctx: WorkerContext, func_name: str | None, args: Sequence[Any]) -> bool:
    """Return True when the job should run in the worker's own process rather than a forked horse."""
    if func_name in ALWAYS_IN_PROCESS:
        return True
    if func_name != FOLD_JOB or ctx.settings.inline_fold_cells <= 0 or not args:
        return False
    cells = fold_cells(ctx, str(args[0]))
    return cells is not None and cells <= ctx.settings.inline_fold_cells


def fold_cells(ctx: WorkerContext, submission_id: str) -> int | None:
    """Return development rows x features of a submission's fold jobs, or None when they must fork.

    None for a submission or dataset that cannot be read (the horse reports that), and for a nested
    search or a learning curve, whose fold jobs fit many times.
    """
    sub = submissions.get(ctx.engine, submission_id)
    if sub is None:
        return None
    config = sub["config"]
    if config.get("search") or config["validation"].get("learning_curve"):
        return None
    dataset = datasets.get_internal(ctx.engine, sub["dataset_id"])
    if dataset is None:
        return None
    return int(dataset["rows_development"]) * len(config["model"]["features"])
