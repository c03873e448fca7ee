"""Give a submission's verdict at the end of the last job it waits on, in that job's process.

The verdict job runs once the summary, the holdout job and any champion folds have finished; RQ then
queues it and a worker picks it up, a hop that costs tens of milliseconds on a busy host. A verdict that
read the holdout is shown at its prompt time only when it is given by then (``service.gate.timing``), so
that hop decides, for a small table, whether the answer is prompt or late (one more counted query). So
the summary job (or a small table's job of every fold, which does the summary's work) and the holdout job,
when they end last, give the verdict themselves. The verdict job, still waiting on the job that gives it, then
has nothing left to do: it is retired (``retire``) before RQ would queue it, which spares a burst of small
submissions a whole RQ job each -- its enqueueing, a worker taking it and running it to find the verdict given.
Anything that goes wrong here is left to the verdict job, which runs as before.
"""

from __future__ import annotations

import logging

from redis import Redis
from rq.exceptions import NoSuchJobError
from rq.job import Job, JobStatus

from service.records import submissions
from service.submission.dispatch import folds_job_id, holdout_job_id, summary_job_id, verdict_job_id
from worker.jobs import verdict
from worker.jobs.runtime import WorkerContext

log = logging.getLogger(__name__)

KEY_PREFIX = "sealfold:early-verdict:"  # set once per submission by the job that gives its verdict
KEY_SECONDS = 3600


def judge_if_last(ctx: WorkerContext, connection: Redis, job_id: str, submission_id: str) -> bool:
    """Give the verdict now when everything the verdict job waits on is done; return whether this call gave it.

    ``job_id`` is the job that is ending (its own status is not yet finished). The summary (or the job of
    every fold, which summarises them) and the holdout job count as done once their outcome is stored (the
    other may be ending at this very moment, its RQ status not yet finished); anything else (a champion's
    folds) once RQ says it finished. Of two jobs that both find everything done, one gives the verdict (a key
    set once in Redis); the verdict job, queued only after both have ended, finds it given.
    """
    try:
        waiting = Job.fetch(verdict_job_id(submission_id), connection=connection)
        if waiting.get_status() != JobStatus.DEFERRED:
            return False  # already queued or run: the verdict job is on its way
        others = [d for d in waiting.dependency_ids if d != job_id]
        if not all(_done(ctx, submission_id, j) for j in Job.fetch_many(others, connection=connection)):
            return False
        if not connection.set(f"{KEY_PREFIX}{submission_id}", job_id, nx=True, ex=KEY_SECONDS):
            return False  # the other job is giving it
        verdict.give_verdict(ctx, connection, submission_id)
        retire(connection, waiting)
        return True
    except NoSuchJobError:
        return False
    except Exception:  # the verdict job gives it, with its own retries
        log.exception("giving the verdict of %s at the end of %s failed; the verdict job will", submission_id, job_id)
        return False


def _done(ctx: WorkerContext, submission_id: str, job: Job | None) -> bool:
    if job is None:
        return False
    if job.get_status(refresh=False) == JobStatus.FINISHED:
        return True
    if job.id in (summary_job_id(submission_id), folds_job_id(submission_id)):  # the latter summarises too
        row = submissions.get(ctx.engine, submission_id)
        return row is not None and row["cv_summary"] is not None
    if job.id == holdout_job_id(submission_id):
        return submissions.get_holdout(ctx.engine, submission_id) is not None
    return False


def retire(connection: Redis, waiting: Job) -> None:
    """Delete the deferred verdict job of a submission whose verdict was just given here.

    Called from inside a job the verdict job depends on, so RQ cannot have queued it yet: it is still
    deferred until that job ends. It leaves the deferred registry and the dependents of each job it
    waited on, so their ends find nothing to queue. Should this fail, the verdict job runs and finds the
    verdict given, as before.
    """
    try:
        with connection.pipeline() as pipe:
            for parent in waiting.dependency_ids:
                pipe.srem(Job.dependents_key_for(parent), waiting.id)
            waiting.delete(pipeline=pipe, remove_from_queue=False)
            pipe.execute()
    except Exception:
        log.exception("could not retire the verdict job %s; it will run and find the verdict given", waiting.id)
