"""Tell the model's own errors from work that did not happen, and end a submission on lost work.

A fold's estimator raising is the submission's result (``worker.jobs.fold`` records it). Anything
else that stops a fold or holdout job is lost work, and no verdict is given on a partial plan:

- a bound exceeded -- the job's timeout, the memory limit -- is deterministic: the job is not
  retried, and the submission fails at once naming the bound;
- a fold process killed by a SIGKILL the worker did not send (the kernel's OOM killer, most likely) is
  retried, since the host may have been short for a moment; when the last attempt is killed too, the
  submission fails as a memory failure naming the likely cause;
- data this worker could not read, a crashed fold process, anything else: RQ retries the job (a
  worker that could not read the data is asked to leave the retry to another one,
  ``worker.process.main``); when the last attempt is lost too, the submission fails naming the cause.

Either way the submission's remaining jobs are stopped (``service.submission.dispatch.stop_jobs``).
"""

from __future__ import annotations

import logging
import resource
import signal
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

from redis import Redis
from rq.job import Job
from rq.timeouts import JobTimeoutException, UnixSignalDeathPenalty

from service.errors import NotFound, SealBroken
from service.records import submissions
from service.submission import dispatch
from service.submission.resolved import ValidationPlan
from service.vocabulary import LIVE_STATES
from worker.jobs.runtime import WorkerContext

log = logging.getLogger(__name__)

AVOID_WORKERS = "sealfold_avoid_workers"  # job.meta key: workers that could not read the job's data
LEFT_COUNT = "sealfold_left"  # job.meta key: how often a worker on that list handed the job back


class MemoryLimitExceeded(Exception):
    """A fold or holdout process needed more memory than the limit allows."""


class KilledBySystem(MemoryError):
    """A process doing a job's work got a SIGKILL its worker did not send: most likely the kernel's OOM killer."""


@dataclass(frozen=True)
class Loss:
    """Why a job's work was lost: a ``FAILURE_CAUSES`` word, the words a submitter reads, and whether to retry."""

    cause: str
    detail: str
    retry: bool


def classify(
    exc: BaseException, what: str, timeout_seconds: int, memory_limit_mib: int, *, sealed: bool = False
) -> Loss:
    """Name the loss of ``what`` ("fold 3 of repeat 0", "the holdout refit") that ``exc`` caused.

    ``sealed``: the job had the holdout open, so an error's own message is left out (it could quote
    sealed values); its class name is kept.
    """
    if isinstance(exc, SealBroken):
        return Loss("data", exc.detail, False)
    if isinstance(exc, JobTimeoutException):
        return Loss("timeout", f"{what} exceeded the {_bound_name(what)} timeout of {timeout_seconds} s", False)
    if isinstance(exc, KilledBySystem):
        # The kernel's OOM killer acts when the host runs out, which can come before the process's own limit.
        limit = f"; it was under its memory limit of {memory_limit_mib} MiB, so the host ran out first" \
            if memory_limit_mib > 0 else ""
        # Retried as a crash is: the host may have been short for a moment (other workers' folds); a fit that
        # is killed on every attempt fails the submission as a memory failure.
        return Loss("memory_limit", f"{what}: the fold process was killed by the operating system (SIGKILL), "
                                    f"most likely out of memory{limit}", True)
    if isinstance(exc, MemoryLimitExceeded | MemoryError) or "MemoryError" in str(exc).split(":", 1)[0]:
        if memory_limit_mib <= 0:
            return Loss("memory_limit", f"{what} ran out of memory (no memory limit is set)", False)
        return Loss("memory_limit", f"{what}: memory limit {memory_limit_mib} MiB exceeded", False)
    if isinstance(exc, NotFound | OSError) or _names_missing_data(exc):
        # our own messages and the OS's name a path, never a value
        return Loss("missing_data", f"{what} could not read the dataset's files on the worker(s) that tried: "
                                    f"{_short(exc, False)}", True)
    return Loss("crash", f"{what} was lost: {_short(exc, sealed)}", True)


def handle_lost_work(
    ctx: WorkerContext, job: Job | None, submission_id: str, loss: Loss
) -> None:
    """Retry the job if the loss allows and attempts remain; otherwise fail the submission with the cause.

    A worker that could not read the data is added to the job's avoid list, so a retry goes to another
    worker where there is one.
    """
    if job is not None:
        if not loss.retry:
            job.retries_left = 0
        elif loss.cause == "missing_data" and job.worker_name:
            avoided = list(job.meta.get(AVOID_WORKERS, []))
            if job.worker_name not in avoided:
                job.meta[AVOID_WORKERS] = [*avoided, job.worker_name]
                job.save_meta()
        if job.retries_left:
            log.warning("%s; retrying (%d attempt(s) left)", loss.detail, job.retries_left)
            return
    fail_submission(ctx, job.connection if job is not None else None, submission_id, loss.cause, loss.detail,
                    spare=job.id if job is not None else None)


def fail_submission(
    ctx: WorkerContext, redis: Redis | None, submission_id: str, cause: str, detail: str, *, spare: str | None = None
) -> bool:
    """Fail a live submission with ``cause`` and stop its remaining jobs; return whether it moved."""
    moved = submissions.transition(ctx.engine, submission_id, "failed", LIVE_STATES, error=detail, cause=cause)
    if moved and redis is not None:
        sub = submissions.get(ctx.engine, submission_id)
        if sub is not None:
            plan = ValidationPlan.from_document(sub["config"]["validation"])
            dispatch.stop_jobs(redis, ctx.settings, submission_id, plan, spare=spare)
    return moved


@contextmanager
def fold_bound(timeout_seconds: int) -> Iterator[None]:
    """Stop the work inside after ``timeout_seconds`` with RQ's ``JobTimeoutException``, as a job's own timeout does.

    For a job that runs several folds (``worker.jobs.run_folds``): each fold gets the fold timeout. A process
    has one alarm, so the job's own (RQ's, the sum of its folds' timeouts) is set aside meanwhile and put
    back afterwards, less the time spent: what the job does after its folds (the summary, the verdict) stays
    bounded. Outside the main thread, where no signal handler runs, the job's own timeout alone applies.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    outer_handler, outer_left = signal.getsignal(signal.SIGALRM), signal.alarm(0)
    started = time.monotonic()
    try:
        with UnixSignalDeathPenalty(timeout_seconds, JobTimeoutException):
            yield
    finally:
        if outer_left:
            signal.signal(signal.SIGALRM, outer_handler)
            signal.alarm(max(1, outer_left - round(time.monotonic() - started)))


def limit_memory(limit_mib: int) -> None:
    """Let this process's address space grow by at most ``limit_mib`` MiB beyond its current size (0: no limit).

    Counted from the process's size when the limit is set (a worker's preloaded libraries are some
    hundreds of MiB of address space), so the setting is what a fold or holdout may add: its copies of
    the rows, the fitted model, scikit-learn's temporaries. Beyond it an allocation fails with
    MemoryError, which ends the job as "memory limit N MiB exceeded".
    """
    if limit_mib <= 0:
        return
    current = _address_space_bytes()
    if current is None:
        return
    _soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    soft = current + (limit_mib << 20)
    if hard != resource.RLIM_INFINITY:
        soft = min(soft, hard)
    resource.setrlimit(resource.RLIMIT_AS, (soft, hard))


def lift_memory_limit() -> None:
    """Remove the soft limit again (as far as the hard limit allows)."""
    _soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    resource.setrlimit(resource.RLIMIT_AS, (hard, hard))


def _address_space_bytes() -> int | None:
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmSize:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError):
        return None
    return None


def _bound_name(what: str) -> str:
    return "holdout" if "holdout" in what else "fold"


def _names_missing_data(exc: BaseException) -> bool:
    head = str(exc).split(":", 1)[0]
    return head in ("NotFound", "FileNotFoundError", "PermissionError", "OSError", "IsADirectoryError")


def _short(exc: BaseException, sealed: bool, limit: int = 300) -> str:
    if sealed:
        return f"{type(exc).__name__} (its message is withheld: the job had the sealed holdout open)"
    text = str(exc).split("\n--- in the fold process:", 1)[0] if str(exc) else type(exc).__name__
    if not text.startswith(type(exc).__name__) and "Error" not in text.split(":", 1)[0]:
        text = f"{type(exc).__name__}: {text}"
    return text if len(text) <= limit else text[:limit] + "..."
