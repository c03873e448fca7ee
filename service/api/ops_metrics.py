"""The ``/metrics`` exposition: this deployment's HTTP metrics plus figures read at scrape time.

HTTP counters and histograms come from ``service.api.telemetry`` (summed over every API process when
``PROMETHEUS_MULTIPROC_DIR`` is set). Everything else is read once per scrape from where it is shared by all
processes and hosts, so any API process gives the same answer: queue depths and live workers from Redis, job
outcomes from the tallies workers keep in Redis (``service.ops.job_tallies``), submissions, fold and
submission durations and holdout queries from the records DB. No label carries an id or a team.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from typing import Any

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.multiprocess import MultiProcessCollector
from prometheus_client.registry import Collector
from redis.exceptions import RedisError
from rq.queue import Queue
from rq.registry import DeferredJobRegistry, FailedJobRegistry, ScheduledJobRegistry, StartedJobRegistry
from sqlalchemy.exc import SQLAlchemyError

from service.api import ServiceContext
from service.api.telemetry import multiprocess_dir
from service.ops import job_tallies
from service.ops.workers import live_workers
from service.records import ops_figures, submissions
from service.submission import team_queues
from service.vocabulary import STATES

log = logging.getLogger(__name__)
# Seconds: a fold from milliseconds to the default one-hour timeout; a submission likewise.
DURATION_BUCKETS = (0.1, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0, 900.0, 3600.0)


class DeploymentCollector(Collector):
    """Figures shared by every process, read at scrape time; a backend that fails is reported, not fatal."""

    def __init__(self, ctx: ServiceContext) -> None:
        self.ctx = ctx

    def collect(self) -> Iterator[Metric]:
        errors = GaugeMetricFamily("sealfold_scrape_errors", "1 when a backend could not be read for this scrape.",
                                   labels=["source"])
        try:
            yield from self._from_database()
            errors.add_metric(["database"], 0)
        except SQLAlchemyError:
            log.warning("metrics: the records database could not be read", exc_info=True)
            errors.add_metric(["database"], 1)
        try:
            yield from self._from_redis()
            errors.add_metric(["redis"], 0)
        except RedisError:
            log.warning("metrics: Redis could not be read", exc_info=True)
            errors.add_metric(["redis"], 1)
        yield errors

    def _from_database(self) -> Iterator[Metric]:
        engine = self.ctx.engine
        by_state = submissions.count_by_state(engine)
        gauge = GaugeMetricFamily("sealfold_submissions", "Submissions in the records DB by state.", labels=["state"])
        for state in sorted(set(by_state) | set(STATES)):
            gauge.add_metric([state], by_state.get(state, 0))
        yield gauge
        yield _histogram("sealfold_submission_duration_seconds", "Seconds from POST to the final state, by state.",
                         "state", ops_figures.submission_durations(engine, DURATION_BUCKETS))
        yield _histogram("sealfold_fold_duration_seconds", "Fit and scoring seconds of each recorded fold, by status.",
                         "status", ops_figures.fold_durations(engine, DURATION_BUCKETS))
        queries = CounterMetricFamily("sealfold_holdout_queries", "Holdout queries answered, by whether a figure "
                                      "was released or withheld.", labels=["outcome"])
        for outcome, n in sorted(ops_figures.holdout_queries(engine).items()):
            queries.add_metric([outcome], n)
        yield queries

    def _from_redis(self) -> Iterator[Metric]:
        redis, settings = self.ctx.redis, self.ctx.settings
        depth = GaugeMetricFamily("sealfold_queue_jobs", "Jobs per queue and state; the work queue's figures are "
                                  "totals over every team's queue.", labels=["queue", "state"])
        # One series for all teams' work: a per-team series would show every team the others' load.
        work = team_queues.work_queues(redis, settings)
        for name, queues in ((settings.queue_name, work), (settings.check_queue_name, [Queue(
                settings.check_queue_name, connection=redis)])):
            depth.add_metric([name, "queued"], sum(q.count for q in queues))
            for state, registry in (("started", StartedJobRegistry), ("deferred", DeferredJobRegistry),
                                    ("scheduled", ScheduledJobRegistry), ("failed", FailedJobRegistry)):
                depth.add_metric([name, state], sum(registry(queue=q).count for q in queues))
        yield depth
        yield GaugeMetricFamily("sealfold_workers_alive", "Workers registered in Redis with a recent heartbeat.",
                                value=live_workers(redis))
        jobs = CounterMetricFamily("sealfold_jobs", "Jobs by kind and outcome, over all workers.",
                                   labels=["kind", "outcome"])
        for (kind, outcome), n in sorted(job_tallies.read(redis).items()):
            jobs.add_metric([kind, outcome], n)
        yield jobs


def _histogram(name: str, documentation: str, label: str, figures: dict[str, Any]) -> HistogramMetricFamily:
    family = HistogramMetricFamily(name, documentation, labels=[label])
    for value, figure in sorted(figures.items()):
        buckets = [(_le(b), n) for b, n in figure["buckets"]] + [("+Inf", figure["count"])]
        family.add_metric([value], buckets, figure["sum"])
    return family


def _le(bound: float) -> str:
    return repr(float(bound))


def exposition(ctx: ServiceContext) -> bytes:
    """The whole ``/metrics`` body in Prometheus text format."""
    path = multiprocess_dir()
    if path:
        http_registry = CollectorRegistry()
        MultiProcessCollector(http_registry, path=path)
    else:
        http_registry = ctx.http_metrics.registry
    deployment = CollectorRegistry(auto_describe=False)
    deployment.register(DeploymentCollector(ctx))
    return generate_latest(http_registry) + generate_latest(deployment)
