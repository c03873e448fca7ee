"""Run a sealfold worker: preload scikit-learn, then let RQ fork one work horse per job.

The worker only runs the functions in ``worker.jobs.ALLOWED_JOBS`` and deserialises jobs as JSON,
so nothing in Redis can make it import or unpickle anything else. Heartbeats every ~10 s and
registry maintenance every ~30 s (by any idle worker) mean the job of a SIGKILLed worker is declared
abandoned and retried within about two minutes (heartbeat TTL = monitoring interval + 60 s, plus
one maintenance tick). Maintenance also runs the reconciler, which re-enqueues work Redis lost.
"""

from __future__ import annotations

import importlib
import logging
from collections.abc import Callable
from typing import Any

from redis import Redis
from rq.exceptions import DeserializationError
from rq.job import Job
from rq.queue import Queue
from rq.serializers import JSONSerializer
from rq.utils import import_attribute
from rq.worker import Worker, WorkerStatus

from service import dispatch
from service.catalog import load_catalog
from service.records.engine import make_engine
from service.settings import Settings
from worker import runtime
from worker.jobs import ALLOWED_JOBS, check_config, judge, summarize
from worker.warmup import warm_up

log = logging.getLogger(__name__)

JOB_MONITORING_INTERVAL = 10
MAINTENANCE_INTERVAL = 30
RECONCILE_LOCK = "sealfold:reconcile-lock"
# Callbacks a job may name; sealfold's own jobs use none, so any name is refused.
ALLOWED_CALLBACKS: frozenset[str] = frozenset()
# Jobs run in the worker's own process instead of a forked work horse (see execute_job).
IN_PROCESS_JOBS: frozenset[str] = frozenset(
    f"{job.__module__}.{job.__name__}" for job in (check_config, summarize, judge)
)


class RefusedJob(Exception):
    """A job named a function or callback this worker does not run."""


class AllowListedJob(Job):
    """An RQ job that resolves only allow-listed function names, never an instance method."""

    @property
    def func(self) -> Callable[..., Any]:
        name = self.func_name
        refused = self.instance is not None or name not in ALLOWED_JOBS
        callbacks = [n for n in (self._success_callback_name, self._failure_callback_name,
                                 self._stopped_callback_name) if n and n not in ALLOWED_CALLBACKS]
        if refused or callbacks:
            self.retries_left = 0  # a retry would be refused the same way
            what = f"callback(s) {callbacks!r}" if not refused else f"function {name!r}"
            raise RefusedJob(f"job {self.id} names {what}, which this worker does not run; it runs only "
                             f"{', '.join(sorted(ALLOWED_JOBS))}")
        assert name is not None
        function: Callable[..., Any] = import_attribute(name)
        return function

    @property
    def success_callback(self) -> Any:
        return self._allowed_callback(self._success_callback_name, lambda: super(AllowListedJob, self)
                                      .success_callback)

    @property
    def failure_callback(self) -> Any:
        return self._allowed_callback(self._failure_callback_name, lambda: super(AllowListedJob, self)
                                      .failure_callback)

    @property
    def stopped_callback(self) -> Any:
        return self._allowed_callback(self._stopped_callback_name, lambda: super(AllowListedJob, self)
                                      .stopped_callback)

    @staticmethod
    def _allowed_callback(name: str | None, resolve: Callable[[], Any]) -> Any:
        if not name:
            return None
        if name not in ALLOWED_CALLBACKS:
            log.warning("ignoring callback %r: not on the worker's allow-list", name)
            return None
        return resolve()


class SealfoldWorker(Worker):
    """RQ's forking worker, plus a fresh DB pool in each work horse and the reconciler in maintenance."""

    job_class = AllowListedJob

    def main_work_horse(self, job: Job, queue: Queue) -> None:
        runtime.after_fork()
        super().main_work_horse(job, queue)

    def execute_job(self, job: Job, queue: Queue) -> None:
        """Run configuration checks, summaries and verdicts in this process; fork a horse for the rest.

        A fork, and the horse's first touch of the inherited heap (thousands of copied pages),
        costs more than any of these jobs: a POST waits for its check, and every submission waits
        for its summary and its verdict after the last fold. They are safe without a horse because
        they read no rows and fit nothing: the check is parameter validation (one dataset row
        read, estimators instantiated from the catalog and validated by scikit-learn), the summary
        is arithmetic on the fold scores stored in the records DB, and the verdict is statistics
        on stored figures (fold scores, the stored holdout score and its per-example losses).
        None keeps anything: every object they make is dropped when they return, the catalog is
        read-only, and their DB connection goes back to this process's pool -- which the
        maintenance reconciler uses already, and which each horse replaces on fork
        (``runtime.after_fork``). RQ's timeout
        still applies, as in SimpleWorker. Fitting, and anything that opens the development or
        sealed rows, always runs in a horse. The choice is by the allow-listed function name
        alone, so no other job can run in-process; a job whose data does not even decode goes
        to a horse, which fails it as before.
        """
        try:
            in_process = job.func_name in IN_PROCESS_JOBS
        except DeserializationError:
            in_process = False
        if not in_process:
            super().execute_job(job, queue)
            return
        execution = self.prepare_execution(job)
        self.perform_job(job, queue, execution)
        self.set_state(WorkerStatus.IDLE)

    def run_maintenance_tasks(self) -> None:
        super().run_maintenance_tasks()
        try:
            reconcile_once(self.connection)
        except Exception:  # the reconciler must never take the worker down; the next tick retries
            log.exception("reconciler failed; retrying at the next maintenance tick")


def reconcile_once(redis: Redis[Any]) -> int:
    """Re-enqueue lost work, unless another worker did so within the last maintenance interval.

    The reconciler is idempotent (deterministic job ids); the lock only saves N workers doing the
    same scan at every tick.
    """
    if not redis.set(RECONCILE_LOCK, "1", nx=True, ex=MAINTENANCE_INTERVAL - 5):
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


def build_worker(settings: Settings, redis: Redis[Any], name: str | None = None) -> SealfoldWorker:
    """Return a worker on the check queue (served first) and the work queue."""
    return SealfoldWorker(
        [settings.check_queue_name, settings.queue_name],
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


def run_worker(settings: Settings, *, burst: bool = False, name: str | None = None) -> None:
    """Install the worker context, preload, and work until stopped (or until the queues are empty)."""
    preload()
    limit_threads()
    engine = make_engine(settings)
    runtime.install(runtime.WorkerContext(settings=settings, engine=engine))
    warm_up(runtime.current())
    redis = Redis.from_url(settings.redis_url)
    worker = build_worker(settings, redis, name)
    try:
        worker.work(burst=burst, logging_level=settings.log_level, with_scheduler=False)
    finally:
        engine.dispose()
