"""Put submission work on the RQ queues, and put it back when Redis lost it.

Jobs are enqueued by dotted name (``worker.jobs.*``), so the API process never imports the worker
or scikit-learn. Job ids are deterministic -- ``<sub>-fold-<repeat>-<fold>``, ``<sub>-summary``,
``<sub>-holdout``, ``<sub>-verdict`` (rq 3 accepts only letters, digits, ``_`` and ``-`` in a job id) -- which makes
re-enqueueing idempotent: the reconciler can run on every worker at once and still produce one job
per piece of work.

Chain per submission::

    holdout (refit on every development row, score the seal exactly once) --+
    fold jobs (one per repeat x fold) --allow_failure--> summary (fan-in) --+--> verdict
    champion fold jobs (only when the champion ran another plan) ------------+   (release the holdout
                                                                                   figure, decide, mark succeeded)

A champion fold job (``<sub>-champion-<repeat>-<fold>``) scores the champion's configuration on one
cell of the submission's plan when that plan differs from the champion's (5x2cv, a fold-count
override), so the CV comparison with the champion stays paired; cells are cached per (champion, plan).

The holdout job depends on none of the folds (the refit on every development row does not need
their results), so it is queued first: it is the longest job of the chain, and a longest-first
order leaves the shortest jobs for the end, where they fill the workers evenly. What it computes
stays in the records DB; the verdict job, which waits for both the summary and the holdout job, is
the only one that releases a figure, so nothing about the holdout leaves the service before the
cross-validation summary exists.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from datetime import timedelta
from typing import Any

from redis import Redis
from redis.exceptions import RedisError
from redis.exceptions import TimeoutError as RedisTimeoutError
from rq import Queue, Retry
from rq.command import send_stop_job_command
from rq.exceptions import InvalidJobOperation
from rq.job import Dependency, Job, JobStatus
from rq.registry import DeferredJobRegistry, ScheduledJobRegistry, StartedJobRegistry
from rq.serializers import JSONSerializer
from rq.utils import current_timestamp
from rq.worker import Worker
from sqlalchemy import Engine

from service.errors import ConfigRejected, FieldProblem, Unavailable
from service.logs import request_id_var
from service.records import champion_folds, champions, submissions
from service.records.engine import as_utc, utcnow
from service.settings import Settings
from service.submission import team_queues
from service.submission.resolved import ValidationPlan

log = logging.getLogger(__name__)

JOB_MODULE = "worker.jobs"
RECONCILE_LOCK = "sealfold:reconciling"
# Longer than any reconcile takes; only a reconciler killed mid-run leaves the lock to expire.
RECONCILE_LOCK_SECONDS = 300
RESULT_TTL = 3600  # results live in the records DB; Redis copies are for debugging only
RETRIES = 2  # retries apply to crashed or abandoned jobs; estimator errors are recorded, not raised


def fold_job_id(sub_id: str, repeat: int, fold: int) -> str:
    """Return the deterministic id of one fold job."""
    return f"{sub_id}-fold-{repeat}-{fold}"


def folds_job_id(sub_id: str) -> str:
    """Return the deterministic id of the job that runs every fold of a submission, one after another."""
    return f"{sub_id}-folds"


def folds_together(settings: Settings, development_rows: int) -> bool:
    """Whether a submission on a dataset of ``development_rows`` runs its folds in one job (``folds_job_id``).

    On a small table a fold job's bookkeeping (RQ's, the records') costs more than its fit: one job for
    every fold, which also summarises them, took ``make bench``'s burst of 100 diabetes submissions on two
    workers from 579, 528 and 571 to 625, 653 and 664 a minute (three pairs of runs). A larger table keeps
    a job per fold, so its folds spread over the workers.
    """
    return 0 < development_rows <= settings.fold_batch_max_rows


def summary_job_id(sub_id: str) -> str:
    """Return the deterministic id of a submission's summary (fan-in) job."""
    return f"{sub_id}-summary"


def holdout_job_id(sub_id: str) -> str:
    """Return the deterministic id of a submission's holdout job."""
    return f"{sub_id}-holdout"


def verdict_job_id(sub_id: str) -> str:
    """Return the deterministic id of a submission's verdict job."""
    return f"{sub_id}-verdict"


def champion_fold_job_id(sub_id: str, repeat: int, fold: int) -> str:
    """Return the deterministic id of the job that scores the champion on one cell of a submission's plan."""
    return f"{sub_id}-champion-{repeat}-{fold}"


def champion_to_replay(engine: Engine, dataset_id: str, validation: ValidationPlan) -> str | None:
    """Return the champion to score on this plan's folds, or None when no job is needed.

    Needed when a champion is in force, its own fold plan differs from ``validation``'s and its
    scores on this plan are not all stored yet (``records.champion_folds``, cached per plan).
    """
    champion_id = champions.current(engine, dataset_id)
    champion = None if champion_id is None else submissions.get(engine, champion_id)
    if champion is None:
        return None
    mine, theirs = validation.fold_plan(), ValidationPlan.from_document(champion["config"]["validation"]).fold_plan()
    key = (mine.scheme, mine.folds, mine.seed)
    if key == (theirs.scheme, theirs.folds, theirs.seed):
        return None
    cached = champion_folds.rows(engine, str(champion_id), champion_folds.plan_name(key))
    stored = {(r["repeat"], r["fold"]) for r in cached}
    return None if set(fold_cells(validation)) <= stored else str(champion_id)


def fold_cells(validation: ValidationPlan) -> list[tuple[int, int]]:
    """Return every (repeat, fold) pair a validation plan runs."""
    return [(r, f) for r in range(validation.repeats) for f in range(validation.folds)]


def enqueue_submission(
    redis: Redis, settings: Settings, team: str, sub_id: str, validation: ValidationPlan, champion: str | None = None,
    *, together: bool = False,
) -> None:
    """Enqueue the whole job chain of a new submission, on its team's queue (``team_queues``).

    ``champion`` (``champion_to_replay``): score that champion's configuration on this plan's folds
    too, in jobs the verdict waits for, so the CV comparison with it is paired. ``together``
    (``folds_together``): every fold in one job instead of a job per fold, which also does the summary
    job's work (the verdict job waits on it instead).
    """
    try:
        queue = team_queues.team_queue(redis, settings, team)
        _enqueue_holdout(queue, settings, sub_id)
        if together:  # one job runs the folds, then summarises them
            summarized_by = _enqueue_folds(queue, settings, sub_id, fold_cells(validation))
        else:
            fold_ids = [_enqueue_fold(queue, settings, sub_id, r, f) for r, f in fold_cells(validation)]
        replay = [] if champion is None else [
            _enqueue_champion_fold(queue, settings, sub_id, champion, r, f) for r, f in fold_cells(validation)]
        if not together:
            _enqueue_summary(queue, settings, sub_id, fold_ids)
            summarized_by = summary_job_id(sub_id)
        _enqueue_verdict(queue, sub_id, [summarized_by, holdout_job_id(sub_id), *replay])
    except RedisError as exc:
        # The submission row exists and the reconciler will enqueue it once Redis is back.
        log.warning("could not enqueue %s: %s", sub_id, exc)


def check_config_remote(
    redis: Redis, settings: Settings, config_doc: dict[str, Any], dataset_id: str
) -> dict[str, Any]:
    """Ask for a configuration check (scikit-learn's validation, then a trial fit); wait for its answer.

    The check queue is served by checkers (``sealfold worker --checker``: processes that never run
    folds, so a check never waits behind a fold) and, between their jobs, by the fold workers. Raises
    ConfigRejected with the field problems, or Unavailable when nothing serves the queue or no answer
    comes within ``check_timeout_seconds``.
    """
    queue = Queue(settings.check_queue_name, connection=redis, serializer=JSONSerializer)
    try:
        if Worker.count(connection=redis, queue=queue) == 0:
            raise Unavailable("no sealfold checker or worker is running to check the configuration; start one "
                              "with `sealfold worker --checker`")
        job = queue.enqueue_call(
            f"{JOB_MODULE}.check_config", args=(config_doc, dataset_id), result_ttl=60, failure_ttl=300,
            timeout=settings.job_timeout_seconds("check"), meta=job_meta(),
        )
        try:
            result = job.latest_result(timeout=max(1, round(settings.check_timeout_seconds)))
        except RedisTimeoutError:  # the socket gave up before the block did: no answer in time, Redis is fine
            result = None
    except RedisError as exc:
        raise Unavailable(f"the job queue is not reachable: {type(exc).__name__}") from exc
    if result is None or result.type != result.Type.SUCCESSFUL:
        raise Unavailable(
            f"no checker answered within {settings.check_timeout_seconds:g} s; run more checkers "
            "(`sealfold worker --checker`)" if result is None
            else "the configuration check crashed in the worker; see the worker log"
        )
    answer: dict[str, Any] = result.return_value or {}
    if not answer.get("ok"):
        problems = [FieldProblem(p["pointer"], p["detail"]) for p in answer.get("problems", [])]
        raise ConfigRejected("; ".join(p.detail for p in problems[:3]) or "configuration rejected", problems)
    return answer


def submission_job_ids(sub_id: str, validation: ValidationPlan) -> list[str]:
    """Return the ids of every job of a submission's chain (of either shape: a job per fold, or one for all)."""
    ids = [folds_job_id(sub_id), *(fold_job_id(sub_id, r, f) for r, f in fold_cells(validation))]
    ids += [champion_fold_job_id(sub_id, r, f) for r, f in fold_cells(validation)]
    return [*ids, summary_job_id(sub_id), holdout_job_id(sub_id), verdict_job_id(sub_id)]


def stop_jobs(
    redis: Redis, settings: Settings, sub_id: str, validation: ValidationPlan, *, spare: str | None = None
) -> int:
    """Stop a finished (failed, canceled) submission's remaining jobs; return how many were stopped.

    Queued and deferred jobs are canceled; running ones -- the holdout's refit included -- get RQ's
    stop command, which kills the process doing the work (the holdout's horse, the worker's fold
    process), so a failed submission costs no more worker time. ``spare`` is the job asking (it
    ends by itself). A job that still starts (a race with a worker taking it) finds its submission
    finished and skips.
    """
    stopped = 0
    try:
        jobs = Job.fetch_many([j for j in submission_job_ids(sub_id, validation) if j != spare],
                              connection=redis, serializer=JSONSerializer)
        for job in jobs:
            if job is None:
                continue
            status = job.get_status(refresh=False)
            if status in (JobStatus.QUEUED, JobStatus.DEFERRED, JobStatus.SCHEDULED):
                job.cancel()
                stopped += 1
            elif status == JobStatus.STARTED and job.worker_name:
                try:
                    send_stop_job_command(redis, job.id, serializer=JSONSerializer)
                    stopped += 1
                except InvalidJobOperation:
                    pass  # it ended meanwhile
    except RedisError as exc:
        log.warning("could not stop the jobs of %s: %s", sub_id, exc)
    return stopped


def cancel_jobs(redis: Redis, settings: Settings, sub_id: str, validation: ValidationPlan) -> None:
    """Stop a canceled submission's jobs, queued and running."""
    stop_jobs(redis, settings, sub_id, validation)


def reconcile(engine: Engine, redis: Redis, settings: Settings, min_age_seconds: float = 20.0) -> int:
    """Re-enqueue the missing jobs of every live submission; return how many jobs were enqueued.

    A job is missing when Redis has no live job under its id and the records DB has no outcome for
    its piece of work -- after a Redis flush or restart, for instance. Submissions touched in the
    last ``min_age_seconds`` are left alone so a POST that is still enqueueing is not raced.
    """
    cutoff = utcnow() - timedelta(seconds=min_age_seconds)
    stale = [s for s in submissions.unfinished(engine) if (as_utc(s["updated_at"]) or cutoff) <= cutoff]
    if not stale:
        return 0
    # Reading what is live and enqueueing what is not must not interleave with another reconciler:
    # two that both read before either writes would each push every missing job id onto the queue,
    # and RQ runs a job once per queue entry. A second reconciler finds the lock held and leaves the
    # work to the first.
    lock = redis.lock(f"{RECONCILE_LOCK}:{settings.queue_name}", timeout=RECONCILE_LOCK_SECONDS, blocking=False)
    if not lock.acquire():
        return 0
    try:
        live: set[str] = set()
        for queue in team_queues.work_queues(redis, settings):
            live |= live_job_ids(queue)
        queues = {team: team_queues.team_queue(redis, settings, team) for team in {sub["team"] for sub in stale}}
        return sum(_reconcile_one(engine, live, queues[sub["team"]], settings, sub) for sub in stale)
    finally:
        lock.release()


def live_job_ids(queue: Queue) -> set[str]:
    """Return the ids of one queue's jobs that will still run or are running: queued, in flight, deferred.

    A job's status alone is not enough: a worker killed between taking a job and starting it leaves
    the job "queued" in no queue, and RQ's clean-up drops a "started" entry whose job never started.
    So liveness is membership: the queue, RQ's intermediate list, an unexpired started entry, or the
    deferred, ready (dependencies met, not yet on the queue) and scheduled registries.
    """
    redis = queue.connection
    live = set(queue.get_job_ids())
    live.update(queue.intermediate_queue.get_job_ids())
    started = StartedJobRegistry(queue=queue)
    for entry in redis.zrangebyscore(started.key, current_timestamp(), "+inf"):
        live.add(started.parse_job_id(entry.decode() if isinstance(entry, bytes) else str(entry)))
    live.update(DeferredJobRegistry(queue=queue).get_job_ids(cleanup=False))
    live.update(queue.ready_job_registry.get_job_ids(cleanup=False))
    live.update(ScheduledJobRegistry(queue=queue).get_job_ids(cleanup=False))
    return live


def _reconcile_one(engine: Engine, live: set[str], queue: Queue, settings: Settings, sub: dict[str, Any]) -> int:
    sub_id = sub["id"]
    done = {(row["repeat"], row["fold"]) for row in submissions.fold_rows(engine, sub_id)}
    enqueued = 0
    scored = submissions.get_holdout(engine, sub_id) is not None
    if not scored and holdout_job_id(sub_id) not in live:  # first, as enqueue_submission puts it
        _enqueue_holdout(queue, settings, sub_id)
        enqueued += 1
    # A live job running every fold covers each fold not recorded yet; after a loss, a job per missing fold.
    together = folds_job_id(sub_id)
    live_folds: list[str] = [together] if together in live else []
    for r, f in fold_cells(ValidationPlan.from_document(sub["config"]["validation"])):
        job_id = fold_job_id(sub_id, r, f)
        if (r, f) in done:
            continue
        if job_id in live:
            live_folds.append(job_id)
        elif together not in live and sub["cv_summary"] is None:
            live_folds.append(_enqueue_fold(queue, settings, sub_id, r, f))
            enqueued += 1
    waits_for: list[str] = []
    validation = ValidationPlan.from_document(sub["config"]["validation"])
    champion = None if sub["verdict"] is not None else champion_to_replay(engine, sub["dataset_id"], validation)
    if champion is not None:
        plan = validation.fold_plan()
        cached = {(r["repeat"], r["fold"]) for r in champion_folds.rows(
            engine, champion, champion_folds.plan_name((plan.scheme, plan.folds, plan.seed)))}
        for r, f in fold_cells(validation):
            job_id = champion_fold_job_id(sub_id, r, f)
            if (r, f) in cached:
                continue
            if job_id not in live:
                _enqueue_champion_fold(queue, settings, sub_id, champion, r, f)
                enqueued += 1
            waits_for.append(job_id)
    if sub["cv_summary"] is None and together in live:  # it summarises once its folds are recorded
        waits_for.append(together)
    elif sub["cv_summary"] is None:
        if summary_job_id(sub_id) not in live:
            _enqueue_summary(queue, settings, sub_id, live_folds)
            enqueued += 1
        waits_for.append(summary_job_id(sub_id))
    if not scored:
        waits_for.append(holdout_job_id(sub_id))
    if verdict_job_id(sub_id) not in live:  # a live submission always ends with its verdict job
        _enqueue_verdict(queue, sub_id, waits_for)
        enqueued += 1
    if enqueued:
        log.info("reconciler re-enqueued %d job(s) of %s", enqueued, sub_id)
    return enqueued


def _enqueue_fold(queue: Queue, settings: Settings, sub_id: str, repeat: int, fold: int) -> str:
    job = queue.enqueue_call(
        f"{JOB_MODULE}.run_fold", args=(sub_id, repeat, fold), job_id=fold_job_id(sub_id, repeat, fold),
        timeout=settings.job_timeout_seconds("fold"), result_ttl=RESULT_TTL, retry=_retry(),
        description=f"fold {fold} of repeat {repeat} of {sub_id}", meta=job_meta(),
    )
    return str(job.id)


def _enqueue_folds(queue: Queue, settings: Settings, sub_id: str, cells: list[tuple[int, int]]) -> str:
    job = queue.enqueue_call(
        f"{JOB_MODULE}.run_folds", args=(sub_id, [[r, f] for r, f in cells]), job_id=folds_job_id(sub_id),
        timeout=settings.job_timeout_seconds("fold") * len(cells), result_ttl=RESULT_TTL, retry=_retry(),
        description=f"the {len(cells)} folds of {sub_id}, one after another", meta=job_meta(),
    )
    return str(job.id)


def _enqueue_champion_fold(queue: Queue, settings: Settings, sub_id: str, champion: str, repeat: int, fold: int) -> str:
    job = queue.enqueue_call(
        f"{JOB_MODULE}.run_champion_fold", args=(sub_id, champion, repeat, fold),
        job_id=champion_fold_job_id(sub_id, repeat, fold), timeout=settings.fold_timeout_seconds,
        result_ttl=RESULT_TTL, retry=_retry(), description=f"champion {champion} on fold {fold} of repeat {repeat} "
                                                           f"of {sub_id}'s plan",
    )
    return str(job.id)


def _enqueue_summary(queue: Queue, settings: Settings, sub_id: str, depends_on: Iterable[str]) -> None:
    deps = list(depends_on)
    queue.enqueue_call(
        f"{JOB_MODULE}.summarize", args=(sub_id,), job_id=summary_job_id(sub_id),
        depends_on=Dependency(jobs=deps, allow_failure=True) if deps else None,
        timeout=600, result_ttl=RESULT_TTL, retry=_retry(), description=f"summary of {sub_id}", meta=job_meta(),
    )


def _enqueue_holdout(queue: Queue, settings: Settings, sub_id: str) -> None:
    queue.enqueue_call(
        f"{JOB_MODULE}.score_holdout", args=(sub_id,), job_id=holdout_job_id(sub_id),
        timeout=settings.job_timeout_seconds("holdout"), result_ttl=RESULT_TTL, retry=_retry(),
        description=f"holdout score of {sub_id}", meta=job_meta(),
    )


def _enqueue_verdict(queue: Queue, sub_id: str, depends_on: list[str]) -> None:
    queue.enqueue_call(
        f"{JOB_MODULE}.give_verdict", args=(sub_id,), job_id=verdict_job_id(sub_id),
        depends_on=Dependency(jobs=depends_on, allow_failure=True) if depends_on else None,
        timeout=600, result_ttl=RESULT_TTL, retry=_retry(), description=f"verdict of {sub_id}", meta=job_meta(),
    )


def job_meta() -> dict[str, str]:
    """The meta a job carries: the id of the request that enqueued it, so worker log lines can name it."""
    request_id = request_id_var.get()
    return {"request_id": request_id} if request_id else {}


def _retry() -> Retry:
    # No interval: a delayed retry would need RQ's scheduler, whose lock a killed worker may still
    # hold for minutes; an immediate retry only needs a live worker.
    return Retry(max=RETRIES)
