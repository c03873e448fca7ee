"""Run a sealfold worker: preload scikit-learn, then run each job here or in a forked work horse.

Where a job runs is ``worker.process.placement``'s choice: checks, summaries, verdicts and fold jobs in this
process (a fold's fitting in the worker's long-lived fold process, ``worker.process.fold_process``), the
holdout job in a horse RQ forks for the one job.

The worker only runs the functions in ``worker.jobs.ALLOWED_JOBS`` and deserialises jobs as JSON,
so nothing in Redis can make it import or unpickle anything else. Heartbeats every ~10 s and
registry maintenance every ~30 s (by any idle worker) mean the job of a SIGKILLed worker is declared
abandoned and retried within about two minutes (heartbeat TTL = monitoring interval + 60 s, plus
one maintenance tick). Maintenance also runs the reconciler, which re-enqueues work Redis lost.
"""

from __future__ import annotations

import importlib
import logging
import os
import signal
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from redis import Redis
from rq.exceptions import DeserializationError
from rq.executions import Execution
from rq.job import Job
from rq.queue import Queue
from rq.serializers import JSONSerializer
from rq.worker import Worker, WorkerStatus

from service.catalog import load_catalog
from service.logs import request_scope
from service.ops import data_identity, job_tallies
from service.records.engine import make_engine
from service.records.schema import require_current
from service.settings import Settings
from service.submission import dispatch
from worker.jobs import holdout, runtime
from worker.jobs.failure import AVOID_WORKERS, LEFT_COUNT, limit_memory
from worker.jobs.runtime import repeating
from worker.process import placement
from worker.process.allowlist import ALLOWED_CALLBACKS, AllowListedJob, RefusedJob, func_name, request_id
from worker.process.connection import worker_redis
from worker.process.data_check import data_checker
from worker.process.fair_order import FairQueueWorker
from worker.process.fetched_data import DataFetcher
from worker.process.fold_process import FoldProcess
from worker.process.outages import outage_tolerated
from worker.process.warmup import warm_up

log = logging.getLogger(__name__)
__all__ = ["ALLOWED_CALLBACKS", "AllowListedJob", "RefusedJob", "SealfoldWorker", "build_worker", "run_worker"]

JOB_MONITORING_INTERVAL = 10
MAINTENANCE_INTERVAL = 30
RECONCILE_TICK = "sealfold:reconcile-tick"
class SealfoldWorker(FairQueueWorker):
    """RQ's forking worker, plus a fresh DB pool in each work horse and the reconciler in maintenance.

    It takes the teams' queues in turn, each within its running cap (``worker.process.fair_order``).

    It also leaves a job whose data it could not read to another worker (``leave_to_another``), and
    stops an in-process job on RQ's stop command by killing its fold process (``kill_horse``).
    """

    job_class = AllowListedJob
    in_process_job: str | None = None  # the id of the job running in this process, if any
    leave_pause_seconds = 0.5
    # A worker's registration outlives it by up to its TTL, so "another worker" may be a dead one: after
    # this many hand-backs (some 10 s) the job runs here anyway, and its last attempt names the missing data.
    leave_limit = 20

    data_problem: str | None = None  # set when this worker stopped because it lost the deployment's data
    data_check: Callable[[], str | None] | None = None  # why the data dir is unusable now, or None

    def main_work_horse(self, job: Job, queue: Queue) -> None:
        runtime.after_fork()
        runtime.mark_disposable()
        # The horse (the holdout job) ends with its job, so the limit and the priority end with it too.
        settings = runtime.current().settings
        limit_memory(settings.memory_limit_mib)
        os.nice(settings.job_nice)
        super().main_work_horse(job, queue)

    def handle_job_success(self, job: Job, queue: Queue, started_job_registry: Any, execution: Any) -> None:
        job_tallies.record(self.connection, func_name(job), "finished", private=self._metrics_private())
        super().handle_job_success(job, queue, started_job_registry, execution)

    def handle_job_failure(self, job: Job, queue: Queue, started_job_registry: Any = None, exc_string: str = "",
                           execution: Execution | None = None) -> None:
        timed_out = "JobTimeoutException" in exc_string
        outcome = "retried" if job.should_retry else "timed_out" if timed_out else "failed"
        job_tallies.record(self.connection, func_name(job), outcome, private=self._metrics_private())
        super().handle_job_failure(job, queue, started_job_registry, exc_string, execution)

    def handle_work_horse_killed(self, job: Job, retpid: Any, ret_val: Any, rusage: Any) -> None:
        super().handle_work_horse_killed(job, retpid, ret_val, rusage)
        name = func_name(job)  # None for a job sealfold did not write: its args are not read
        if name is not None and name.endswith(".score_holdout"):
            holdout.after_horse_died(runtime.current(), name, job.args, ret_val)

    def unsubscribe(self) -> None:
        """Stop listening for RQ's commands without the wait that made a stopping worker miss its grace period.

        RQ sends UNSUBSCRIBE and only then asks redis-py's listening thread to stop, joining it without a
        limit. When the thread reads the reply first, it finds no subscription left and waits up to 60 s
        for a new one, and the worker with it: after a burst, one worker in three overran the 10 s the
        supervisor grants and was killed. Here the thread is told to stop first, so the reply wakes a thread
        that then ends; the join is bounded all the same.
        """
        thread = self.pubsub_thread
        if thread is None or self.pubsub is None:
            return
        self.log.info("Worker %s: unsubscribing from channel %s", self.name, self.pubsub_channel_name)
        # Clear its running flag, so the reply to UNSUBSCRIBE ends its loop. redis-py 8's stop() then joins (for at
        # most ``timeout``); older ones, still within the declared range, take no argument and never join.
        try:
            thread.stop(timeout=0)
        except TypeError:
            thread.stop()
        with outage_tolerated(self, "unsubscribing"):
            self.pubsub.unsubscribe()
        thread.join(timeout=1)
        self.pubsub.close()

    def _metrics_private(self) -> bool:  # only operators read /metrics: a holdout job's end may be tallied
        return bool(self.settings is not None and self.settings.metrics_token)

    def kill_horse(self, sig: signal.Signals = signal.SIGKILL) -> None:
        """Stop the current job: a horse as RQ does, an in-process fold by killing the fold process.

        RQ's own version would signal the process group of a stale horse pid (or of this worker) when
        the job runs here; the other in-process jobs are short and end by themselves.
        """
        if self.in_process_job is None:
            super().kill_horse(sig)
            return
        runner = runtime.fold_runner()
        if isinstance(runner, FoldProcess):
            runner.kill()  # the job's wait on it ends with FoldProcessDied; RQ marks the job stopped

    def leave_to_another(self, job: Job, queue: Queue) -> bool:
        """Put back a job this worker could not read the data of, when another live worker can take it.

        ``worker.jobs.failure`` adds a worker to a job's avoid list when the job's data could not be
        read there; the retry then goes to a worker not on the list. With no such worker, this one
        runs it (and its last attempt fails the submission naming the missing data).
        """
        avoided = set(job.meta.get(AVOID_WORKERS, ()))
        left = int(job.meta.get(LEFT_COUNT, 0))
        if self.name not in avoided or left >= self.leave_limit:
            return False
        # Every fold worker registers on the base queue; a team queue, found at runtime, lists none.
        base = queue if self.settings is None else Queue(self.settings.queue_name, connection=self.connection)
        others = [w for w in Worker.all(queue=base) if w.name not in avoided and w.name != self.name]
        if not others:
            return False
        job.meta[LEFT_COUNT] = left + 1
        job.save_meta()
        with self.connection.pipeline() as pipe:
            pipe.lrem(queue.intermediate_queue_key, 1, job.id)
            queue._enqueue_job(job, pipeline=pipe)
            pipe.execute()
        log.info("job %s could not read its data here; left to %s", job.id, ", ".join(w.name for w in others))
        time.sleep(self.leave_pause_seconds)  # let another worker take it first
        return True

    def execute_job(self, job: Job, queue: Queue) -> None:
        """Run the job in this process when ``worker.process.placement`` says so; fork a horse for the rest.

        An in-process job keeps its heartbeat going from a thread (``heartbeats_while``), as a
        forking worker does while it waits for its horse, so a killed worker's job is declared
        abandoned and retried the same way whichever process ran it.
        """
        problem = self.data_check() if self.data_check is not None else None
        if problem is not None:
            # Not this job's fault: put it back for a worker that sees the data, and stop taking work.
            log.error("refusing job %s and stopping: %s", job.id, problem)
            queue.enqueue_job(job, at_front=True)
            self.data_problem = problem
            self.request_stop(0, None)
            return
        if self.leave_to_another(job, queue) or not self.take_slot(job, queue):
            self.set_state(WorkerStatus.IDLE)
            return
        job_tallies.record(self.connection, func_name(job), "started")
        if self.settings is not None:  # this worker's timeout for the kind, whatever the enqueuer said
            name = func_name(job)  # None for a job sealfold did not write: its args are not read
            folds = 1 if name is None else placement.folds_in(name, job.args)
            job.timeout = self.settings.job_timeout_seconds(job_tallies.kind_of(name)) * folds
        try:
            with request_scope(request_id(job)):
                self._execute(job, queue)
        finally:
            self.free_slot(job, queue)

    def _execute(self, job: Job, queue: Queue) -> None:
        try:
            in_process = placement.runs_in_process(job.func_name)
        except DeserializationError:
            in_process = False
        if not in_process:
            super().execute_job(job, queue)
        else:
            execution = self.prepare_execution(job)
            if isinstance(job, AllowListedJob):
                job.keepalive = lambda: self.heartbeats_while(job, execution)
            self.in_process_job = job.id
            try:
                self.perform_job(job, queue, execution)
            finally:
                self.in_process_job = None
            self.set_state(WorkerStatus.IDLE)
        self.enqueue_ready_dependents()

    @contextmanager
    def heartbeats_while(self, job: Job, execution: Execution) -> Iterator[None]:
        """Send the heartbeats of a job running in this process every monitoring interval.

        The thread stops before the job's outcome is written (it wraps only the job function), so
        a late heartbeat never brings a finished job back into the started registry.
        """
        def beat() -> None:
            try:
                self.maintain_heartbeats(job, execution)
            except Exception:  # a missed beat is retried at the next interval
                log.warning("heartbeat of job %s failed", job.id, exc_info=True)
                raise

        with repeating(self.job_monitoring_interval, beat, f"heartbeat-{job.id}"):
            yield

    def run_maintenance_tasks(self) -> None:
        with outage_tolerated(self, "maintenance"):
            super().run_maintenance_tasks()
        try:
            reconcile_once(self.connection)
        except Exception:  # the reconciler must never take the worker down; the next tick retries
            log.exception("reconciler failed; retrying at the next maintenance tick")


def reconcile_once(redis: Redis[Any]) -> int:
    """Re-enqueue lost work, unless another worker did so within the last maintenance interval.

    The reconciler is idempotent (deterministic job ids) and excludes a concurrent run itself; this
    key only saves N workers doing the same scan at every tick.
    """
    if not redis.set(RECONCILE_TICK, "1", nx=True, ex=MAINTENANCE_INTERVAL - 5):
        return 0
    ctx = runtime.current()
    return dispatch.reconcile(ctx.engine, redis, ctx.settings)


def preload() -> None:
    """Import numpy, pandas, scikit-learn and every catalog module before forking.

    Each work horse is a fork of this process, so what is imported here is shared copy-on-write
    and no job pays the import cost.
    """
    for module in ("numpy", "pandas", "scipy.stats", "sklearn", "sklearn.pipeline", "sklearn.compose",
                   "sklearn.metrics", "worker.jobs"):
        importlib.import_module(module)
    for entry in load_catalog().entries.values():
        importlib.import_module(entry.module)


def limit_threads() -> None:
    """Give each fold job one core: BLAS and OpenMP pools of one thread (scale out with workers)."""
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1)


def build_worker(
    settings: Settings, redis: Redis[Any], name: str | None = None, *, checker: bool = False
) -> SealfoldWorker:
    """Return a worker on the check queue (served first) and the work queues in turn; a checker serves checks only."""
    queues = [settings.check_queue_name] if checker else [settings.check_queue_name, settings.queue_name]
    worker = SealfoldWorker(
        queues,
        connection=redis,
        name=name,
        serializer=JSONSerializer,
        job_class=AllowListedJob,
        job_monitoring_interval=JOB_MONITORING_INTERVAL,
        maintenance_interval=MAINTENANCE_INTERVAL,
        # An idle worker blocks on the queues for worker_ttl - 15 s; keep that at the maintenance
        # interval so the reconciler and registry clean-up also run on an idle worker.
        worker_ttl=MAINTENANCE_INTERVAL + 15,
    )
    worker.settings = settings
    worker.fair = not checker
    return worker


def run_worker(settings: Settings, *, burst: bool = False, name: str | None = None, checker: bool = False) -> None:
    """Install the worker context, preload, and work until stopped (or until the queues are empty).

    A checker (``checker``) serves only the check queue and never runs a fold, so a submission's check
    is answered while every fold worker is busy; it has no fold process.

    Raises ``SchemaOutOfDate`` before loading anything when the records database is not at this code's revision,
    and ``DataNotShared`` when the data dir is not the deployment's (at start, or later before a job: the job
    goes back to the queue for another worker and this one stops).
    """
    engine = make_engine(settings)
    fetcher = DataFetcher(settings) if settings.data_source == "api" else None
    try:
        require_current(engine)
        recorded = data_identity.recorded_identity(engine)
        data_check = data_checker(settings, recorded, fetcher)
        problem = data_check(True)
    finally:
        engine.dispose()  # nothing open crosses the fold process's fork
    if problem is not None or recorded is None:
        raise data_identity.DataNotShared(problem or "no data identity")
    if fetcher is not None:
        fetcher.sweep_sealed()  # no sealed rows left on this worker's disk by older versions or killed jobs
    preload()
    limit_threads()
    runtime.install(runtime.WorkerContext(settings=settings, engine=engine))
    runtime.install_data_source(fetcher)
    warm_up(runtime.current())
    folds = FoldProcess()
    if not checker:
        folds.start()  # forked now, warm and before any thread exists
        runtime.install_fold_runner(folds)
    redis = worker_redis(settings.redis_url)
    worker = build_worker(settings, redis, name, checker=checker)
    worker.data_check = lambda: data_check(False)
    try:
        worker.work(burst=burst, logging_level=settings.log_level, with_scheduler=False)
        if worker.data_problem is not None:
            raise data_identity.DataNotShared(worker.data_problem)
    finally:
        folds.stop()
        engine.dispose()
