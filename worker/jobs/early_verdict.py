"""Give a submission's verdict at the end of the last job it waits on, in that job's process.

The verdict job runs once the summary, the holdout job and any champion folds have finished; RQ then
queues it and a worker picks it up, a hop that costs tens of milliseconds on a busy host. A verdict that
read the holdout is shown at its prompt time only when it is given by then (``service.gate.timing``), so
that hop decides, for a small table, whether the answer is prompt or late (one more counted query). So
the summary job and the holdout job, when they end last, give the verdict themselves; the verdict job
then finds it given. Anything that goes wrong here is left to the verdict job, which runs as before.
"""

from __future__ import annotations

import logging

from redis import Redis
from rq.exceptions import NoSuchJobError
from rq.job import Job, JobStatus

from service.submission.dispatch import verdict_job_id
from worker.jobs import verdict
from worker.jobs.runtime import WorkerContext

log = logging.getLogger(__name__)


def judge_if_last(ctx: WorkerContext, connection: Redis, job_id: str, submission_id: str) -> bool:
    """Give the verdict now when every other job the verdict job waits on has finished; return whether given.

    ``job_id`` is the job that is ending (its own status is not yet finished). Two jobs ending at once may
    both see the other still running: neither gives it, and the verdict job does.
    """
    try:
        waiting = Job.fetch(verdict_job_id(submission_id), connection=connection)
        if waiting.get_status() != JobStatus.DEFERRED:
            return False  # already queued or run: the verdict job is on its way
        others = [d for d in waiting.dependency_ids if d != job_id]
        ended = Job.fetch_many(others, connection=connection)
        if any(j is None or j.get_status(refresh=False) != JobStatus.FINISHED for j in ended):
            return False
        verdict.give_verdict(ctx, connection, submission_id)
        return True
    except NoSuchJobError:
        return False
    except Exception:  # the verdict job gives it, with its own retries
        log.exception("giving the verdict of %s at the end of %s failed; the verdict job will", submission_id, job_id)
        return False
