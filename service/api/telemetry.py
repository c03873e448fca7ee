"""Per-request telemetry: the request id, the access log line, and the HTTP metrics.

Every request gets an id: the client's ``X-Request-ID`` when it is a short token, else a fresh one. It is
echoed in the response, tagged on every log line written while the request is served, and stored in the
meta of the jobs the request enqueues (``service.submission.dispatch``), so a worker's lines about those
jobs carry it too.

HTTP metrics are prometheus-client objects in a registry of the app's own. Under several API processes
(gunicorn), set ``PROMETHEUS_MULTIPROC_DIR`` to an empty directory before they start: each process then
writes its samples there and ``/metrics`` sums them over all processes, whichever process answers the
scrape (``service.api.gunicorn_hooks`` removes a dead worker's live samples). Labels are the method, the
route template (``/v1/submissions/<sub_id>``, never the path) and the status: no ids, no team names.
"""

from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass, field

from flask import Flask, Response, g, request
from prometheus_client import CollectorRegistry, Counter, Histogram, disable_created_metrics

from service.logs import accepted_request_id, request_id_var

REQUEST_ID_HEADER = "X-Request-ID"
MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"
# Seconds; an API answer is usually milliseconds, an upload can take seconds.
LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)

access_log = logging.getLogger("sealfold.access")
disable_created_metrics()  # no *_created series: they double the output and nobody graphs them


def multiprocess_dir() -> str | None:
    """The directory prometheus-client shares samples through, or None in a single process."""
    return os.environ.get(MULTIPROC_ENV) or None


@dataclass
class HttpMetrics:
    """The app's request counter and latency histogram, in a registry of its own."""

    registry: CollectorRegistry = field(default_factory=lambda: CollectorRegistry(auto_describe=True))

    def __post_init__(self) -> None:
        self.requests = Counter("sealfold_http_requests", "Requests answered, by method, route and status.",
                                ("method", "route", "status"), registry=self.registry)
        self.latency = Histogram("sealfold_http_request_duration_seconds",
                                 "Time to answer a request, by method, route and status.",
                                 ("method", "route", "status"), buckets=LATENCY_BUCKETS, registry=self.registry)


def install(app: Flask, metrics: HttpMetrics) -> None:
    """Add the request-id, access-log and metrics hooks to ``app``."""

    @app.before_request
    def _start() -> None:
        g.sealfold_started = time.perf_counter()
        g.sealfold_request_id = accepted_request_id(request.headers.get(REQUEST_ID_HEADER))
        g.sealfold_request_token = request_id_var.set(g.sealfold_request_id)

    @app.after_request
    def _finish(response: Response) -> Response:
        started = g.pop("sealfold_started", None)
        seconds = time.perf_counter() - started if started is not None else 0.0
        route = request.url_rule.rule if request.url_rule is not None else "unmatched"
        status = str(response.status_code)
        metrics.requests.labels(request.method, route, status).inc()
        metrics.latency.labels(request.method, route, status).observe(seconds)
        request_id = g.get("sealfold_request_id") or accepted_request_id(None)
        response.headers[REQUEST_ID_HEADER] = request_id
        access_log.info("%s %s %s %.1f ms", request.method, request.path, status, seconds * 1000,
                        extra={"method": request.method, "route": route, "status": response.status_code,
                               "duration_ms": round(seconds * 1000, 2),
                               "bytes": response.calculate_content_length()})
        return response

    @app.teardown_request
    def _forget(_exc: BaseException | None) -> None:
        token = g.pop("sealfold_request_token", None)
        if token is not None:
            request_id_var.reset(token)
