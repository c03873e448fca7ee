"""Operational endpoints, open to anyone: liveness, readiness, Prometheus metrics.

``/openapi.json`` is served by flask-smorest itself (see ``service.app``). What ``/metrics`` shows, and how it
stays whole under several API processes, is ``service.api.ops_metrics``'s.
"""

from __future__ import annotations

import hmac
import ipaddress
import shutil
from pathlib import Path

from flask import Response, request
from redis.exceptions import RedisError
from sqlalchemy import text
from sqlalchemy.exc import SQLAlchemyError

from service.api import SealfoldBlueprint, json_response, service_context
from service.api.ops_metrics import exposition
from service.api.schemas import HealthSchema, ReadinessSchema
from service.errors import Forbidden, Unauthenticated, Unavailable
from service.ops import data_identity
from service.ops.workers import live_workers

blp = SealfoldBlueprint("operations", __name__, description="Liveness, readiness and metrics (no key needed).")
_OPEN: dict[str, list[object]] = {"security": []}
PROMETHEUS_MIMETYPE = "text/plain; version=0.0.4; charset=utf-8"


@blp.route("/healthz")
@blp.doc(**_OPEN)
@blp.response(200, HealthSchema)
def healthz() -> Response:
    """Answer while the process is up; checks nothing else."""
    return json_response({"status": "ok"})


@blp.route("/readyz")
@blp.doc(**_OPEN)
@blp.response(200, ReadinessSchema)
@blp.problem(503, "A check failed: the records DB, Redis, live workers, the data dir or free disk")
def readyz() -> Response:
    """Answer 200 when every check passes, else a 503 problem naming each that failed.

    Checks: the records DB and Redis answer; at least one worker is registered with a live heartbeat; the
    data dir is this deployment's (its identity marker matches the records DB); its file system has at least
    ``SEALFOLD_MIN_FREE_DISK_MB`` free.
    """
    ctx = service_context()
    checks: dict[str, str] = {}
    problems: list[str] = []
    try:
        with ctx.engine.connect() as conn:
            conn.execute(text("SELECT 1"))
        checks["database"] = "ok"
        data = data_identity.check(ctx.engine, ctx.settings.data_dir)
        checks["data"] = "ok" if data is None else "not this deployment's"
        if data is not None:
            problems.append(data)
    except SQLAlchemyError:
        checks["database"] = "unreachable"
        problems.append("the records database is not reachable")
    try:
        ctx.redis.ping()
        checks["redis"] = "ok"
        alive = live_workers(ctx.redis)
        checks["workers"] = f"{alive} alive" if alive else "none alive"
        if not alive:
            problems.append("no worker is alive")
    except RedisError:
        checks["redis"] = "unreachable"
        problems.append("redis is not reachable")
    free_mb = _free_mb(ctx.settings.data_dir)
    checks["disk"] = f"{free_mb} MiB free"
    if free_mb < ctx.settings.min_free_disk_mb:
        problems.append(f"the data dir has {free_mb} MiB free, under the {ctx.settings.min_free_disk_mb} MiB minimum")
    if problems:
        raise Unavailable("not ready: " + "; ".join(problems))
    return json_response({"status": "ready", "checks": checks})


def _free_mb(path: Path) -> int:
    """Free MiB on the file system holding ``path`` (or its nearest existing parent)."""
    while not path.exists() and path != path.parent:
        path = path.parent
    return shutil.disk_usage(path).free // (1024 * 1024)


@blp.route("/metrics")
@blp.doc(**_OPEN, responses={"200": {"description": "Prometheus text exposition format",
                                     "content": {"text/plain": {"schema": {"type": "string"}}}}})
@blp.problem(401, "SEALFOLD_METRICS_TOKEN is set and the request did not carry it")
@blp.problem(403, "SEALFOLD_METRICS_TOKEN is unset and the request came from another host")
def metrics() -> Response:
    """Expose HTTP, queue, worker, job, submission, fold and holdout-query figures for Prometheus.

    With ``SEALFOLD_METRICS_TOKEN`` set, only ``Authorization: Bearer <that token>``; unset, only callers on
    this host (loopback). The figures are sums over every team: a team that could read them could subtract its
    own counts and learn another's, so they are for operators.
    """
    ctx = service_context()
    token = ctx.settings.metrics_token
    if token:
        sent = request.headers.get("Authorization", "")
        if not hmac.compare_digest(sent.encode(), f"Bearer {token}".encode()):
            raise Unauthenticated("/metrics needs the operators' token: Authorization: Bearer <SEALFOLD_METRICS_TOKEN>")
    elif not _loopback(request.remote_addr):
        raise Forbidden("/metrics answers callers on this host only while SEALFOLD_METRICS_TOKEN is unset; set it "
                        "and scrape with Authorization: Bearer <token>")
    return Response(exposition(ctx), mimetype=None, content_type=PROMETHEUS_MIMETYPE)


def _loopback(address: str | None) -> bool:
    try:
        return address is not None and ipaddress.ip_address(address).is_loopback
    except ValueError:
        return False
