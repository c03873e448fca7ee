"""Operational endpoints, open to anyone: liveness, readiness, Prometheus metrics.

``/openapi.json`` is served by flask-smorest itself (see ``service.app``). Request counts are per
process: under several API processes, Prometheus sums the scraped series.
"""

from __future__ import annotations

import threading
from collections import Counter

from flask import Response, request
from redis.exceptions import RedisError
from sqlalchemy import text
from sqlalchemy.exc import SQLAlchemyError

from service.api import SealfoldBlueprint, json_response, service_context
from service.api.schemas import HealthSchema, ReadinessSchema
from service.errors import Unavailable
from service.records import submissions
from service.vocabulary import STATES

blp = SealfoldBlueprint("operations", __name__, description="Liveness, readiness and metrics (no key needed).")
_OPEN: dict[str, list[object]] = {"security": []}
PROMETHEUS_MIMETYPE = "text/plain; version=0.0.4; charset=utf-8"


class RequestTally:
    """Counts answered requests by method, route template and status (templates keep labels few)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._counts: Counter[tuple[str, str, int]] = Counter()

    def count(self, method: str, route: str, status: int) -> None:
        """Add one answered request."""
        with self._lock:
            self._counts[(method, route, status)] += 1

    def snapshot(self) -> dict[tuple[str, str, int], int]:
        """Return a copy of the counts."""
        with self._lock:
            return dict(self._counts)


def count_request(response: Response) -> Response:
    """after_request hook: tally the request under its route template."""
    rule = request.url_rule.rule if request.url_rule is not None else "unmatched"
    service_context().tally.count(request.method, rule, response.status_code)
    return response


@blp.route("/healthz")
@blp.doc(**_OPEN)
@blp.response(200, HealthSchema)
def healthz() -> Response:
    """Answer while the process is up; checks nothing else."""
    return json_response({"status": "ok"})


@blp.route("/readyz")
@blp.doc(**_OPEN)
@blp.response(200, ReadinessSchema)
@blp.problem(503, "The records DB or Redis is not reachable")
def readyz() -> Response:
    """Answer 200 when the records DB and Redis both answer, else a 503 problem naming which failed."""
    ctx = service_context()
    checks: dict[str, str] = {}
    try:
        with ctx.engine.connect() as conn:
            conn.execute(text("SELECT 1"))
        checks["database"] = "ok"
    except SQLAlchemyError:
        checks["database"] = "unreachable"
    try:
        ctx.redis.ping()
        checks["redis"] = "ok"
    except RedisError:
        checks["redis"] = "unreachable"
    failed = [name for name, state in checks.items() if state != "ok"]
    if failed:
        raise Unavailable(f"not ready: {' and '.join(failed)} not reachable")
    return json_response({"status": "ready", "checks": checks})


@blp.route("/metrics")
@blp.doc(**_OPEN, responses={"200": {"description": "Prometheus text exposition format",
                                     "content": {"text/plain": {"schema": {"type": "string"}}}}})
def metrics() -> Response:
    """Expose submissions by state (from the records DB) and this process's request counts."""
    ctx = service_context()
    lines = [
        "# HELP sealfold_submissions Submissions in the records DB by state.",
        "# TYPE sealfold_submissions gauge",
    ]
    by_state = submissions.count_by_state(ctx.engine)
    for state in sorted(set(by_state) | set(STATES)):
        lines.append(f'sealfold_submissions{{state="{state}"}} {by_state.get(state, 0)}')
    lines += [
        "# HELP sealfold_http_requests_total Requests answered by this API process.",
        "# TYPE sealfold_http_requests_total counter",
    ]
    for (method, route, status), n in sorted(ctx.tally.snapshot().items()):
        labels = f'method="{method}",route="{_label(route)}",status="{status}"'
        lines.append(f"sealfold_http_requests_total{{{labels}}} {n}")
    return Response("\n".join(lines) + "\n", mimetype=None, content_type=PROMETHEUS_MIMETYPE)


def _label(value: str) -> str:
    """Escape a Prometheus label value (backslash, double quote, newline)."""
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
