"""Decide where a job runs: in the worker's own process, or in a work horse forked for the one job.

A fork of the worker (some 150 MB of preloaded libraries), the horse's first touch of the pages it
inherited, new DB and Redis connections and the horse's exit cost 30-60 ms per job on a 2-core
machine -- more than the whole work of a fold on a table of a few thousand rows, and paid again at
every one of a submission's jobs. So, as RQ sees it, these run in the worker's own process:

- the configuration check, the summary and the verdict: they read no rows and fit nothing
  (parameter validation with one dataset row read; arithmetic and statistics on stored figures);
- fold jobs, whose fitting the worker hands to its long-lived fold process (``worker.process.fold_process``),
  which keeps a horse's isolation -- a timeout or a crash kills that process, not the worker --
  without a fork per job.

The holdout job always runs in a horse, so the sealed rows are only ever read in a process that
ends with the job. Any other name forks too, where the allow-list refuses it.

What an in-process job may rely on, and why that is safe: nothing it makes outlives it (each job
builds its own objects; the catalog is read-only); its records-DB connection goes back to this
process's pool, which every child replaces on fork (``runtime.after_fork``); RQ's timeout still
applies (SIGALRM, as in RQ's SimpleWorker); and the worker keeps the job's heartbeat going from a
thread while it runs, so the job of a killed worker is declared abandoned and retried exactly as a
horse's is.
"""

from __future__ import annotations

from typing import Any

from worker.jobs import check_config, give_verdict, run_fold, run_folds, summarize


def _dotted(job: Any) -> str:
    return f"{job.__module__}.{job.__name__}"


IN_PROCESS_JOBS: frozenset[str] = frozenset(
    _dotted(job) for job in (check_config, summarize, give_verdict, run_fold, run_folds))


def runs_in_process(func_name: str | None) -> bool:
    """Return True when the job runs in the worker's own process rather than in a forked horse."""
    return func_name in IN_PROCESS_JOBS


def folds_in(func_name: str | None, args: Any) -> int:
    """How many folds a job runs: the cells of a ``run_folds`` job, else 1 (its timeout is this many fold timeouts)."""
    if func_name == _dotted(run_folds) and isinstance(args, list | tuple) and len(args) > 1:
        return max(1, len(args[1]))
    return 1
