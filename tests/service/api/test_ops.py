"""Liveness, readiness, metrics and the catalog listing."""

from __future__ import annotations

import dataclasses
import re
from typing import TYPE_CHECKING, Any

from prometheus_client.parser import text_string_to_metric_families
from redis import Redis

from service.ops.data_identity import marker_path
from service.submission import team_queues
from tests.support.servers import register_worker

if TYPE_CHECKING:
    from tests.support.api import Api



def test_healthz_needs_no_key_and_no_backend(api: Api) -> None:
    reply = api.get(None, "/healthz")
    assert reply.status_code == 200 and reply.get_json() == {"status": "ok"}


def _register_worker(api: Api) -> Any:
    ctx = api.app.extensions["sealfold"]
    return register_worker(ctx.redis, ctx.settings.queue_name)


def test_readyz_checks_database_redis_workers_data_and_disk(api: Api) -> None:
    problem = api.problem(api.get(None, "/readyz"), 503)
    assert "no worker is alive" in problem["detail"]  # nothing has registered yet
    worker = _register_worker(api)
    reply = api.get(None, "/readyz")
    assert reply.status_code == 200, reply.get_data(as_text=True)
    checks = reply.get_json()["checks"]
    assert {k: checks[k] for k in ("database", "redis", "data", "workers")} == {
        "database": "ok", "redis": "ok", "data": "ok", "workers": "1 alive"}
    assert checks["disk"].endswith("MiB free")

    ctx = api.app.extensions["sealfold"]
    marker = marker_path(ctx.settings.data_dir)
    identity = marker.read_text()
    marker.write_text("another-deployment\n")
    problem = api.problem(api.get(None, "/readyz"), 503)
    assert "belongs to another deployment" in problem["detail"] and "redis" not in problem["detail"]
    marker.write_text(identity)

    worker.register_death()
    assert "no worker is alive" in api.problem(api.get(None, "/readyz"), 503)["detail"]
    _register_worker(api)
    # Port 1 is never a Redis server: the ping fails fast with a refused connection.
    api.app.extensions["sealfold"] = dataclasses.replace(
        ctx, redis=Redis.from_url("redis://127.0.0.1:1/0", socket_connect_timeout=0.5))
    problem = api.problem(api.get(None, "/readyz"), 503)
    assert "redis" in problem["detail"] and "database" not in problem["detail"]


def test_readyz_fails_when_free_disk_is_under_the_minimum(api: Api) -> None:
    _register_worker(api)
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(
        ctx, settings=dataclasses.replace(ctx.settings, min_free_disk_mb=10**12))  # more than any disk
    problem = api.problem(api.get(None, "/readyz"), 503)
    assert "MiB minimum" in problem["detail"]


def _families(text: str) -> dict[str, Any]:
    # prometheus-client's own parser is the reference for the exposition format.
    return {family.name: family for family in text_string_to_metric_families(text)}


def _value(families: dict[str, Any], family: str, sample: str, **labels: str) -> float:
    for s in families[family].samples:
        if s.name == sample and all(s.labels.get(k) == v for k, v in labels.items()):
            return float(s.value)
    raise AssertionError(f"no sample {sample}{labels} in {family}")


def test_metrics_are_prometheus_text(api: Api) -> None:
    api.get(None, "/healthz")
    api.get(None, "/healthz")
    api.get(None, "/v1/catalog")
    reply = api.get(None, "/metrics")
    assert reply.status_code == 200
    assert reply.headers["Content-Type"].startswith("text/plain; version=0.0.4")
    families = _families(reply.get_data(as_text=True))
    assert families["sealfold_submissions"].type == "gauge"
    assert _value(families, "sealfold_submissions", "sealfold_submissions", state="queued") == 0
    requests = "sealfold_http_requests"
    assert _value(families, requests, f"{requests}_total", method="GET", route="/healthz", status="200") == 2
    assert _value(families, requests, f"{requests}_total", method="GET", route="/v1/catalog", status="401") == 1
    latency = "sealfold_http_request_duration_seconds"
    assert _value(families, latency, f"{latency}_count", method="GET", route="/healthz", status="200") == 2
    for name in ("sealfold_queue_jobs", "sealfold_workers_alive", "sealfold_jobs", "sealfold_holdout_queries",
                 "sealfold_submission_duration_seconds", "sealfold_fold_duration_seconds"):
        assert name in families, name


def test_queue_metrics_total_every_teams_queue_and_name_no_team(api: Api) -> None:
    ctx = api.app.extensions["sealfold"]
    fleet = team_queues.team_queue(ctx.redis, ctx.settings, "fleet")
    rivals = team_queues.team_queue(ctx.redis, ctx.settings, "rivals")
    for queue, count in ((fleet, 2), (rivals, 1)):
        for i in range(count):
            queue.enqueue_call("worker.jobs.summarize", args=(f"sub_{i}",))
    families = _families(api.get(None, "/metrics").get_data(as_text=True))
    assert _value(families, "sealfold_queue_jobs", "sealfold_queue_jobs", queue=ctx.settings.queue_name,
                  state="queued") == 3
    # One series per queue kind: a team's queue (hence its load) is never a label other teams could read.
    assert {s.labels["queue"] for s in families["sealfold_queue_jobs"].samples} == {
        ctx.settings.queue_name, ctx.settings.check_queue_name}


def test_metrics_can_be_restricted_to_operators(api: Api) -> None:
    ctx = api.app.extensions["sealfold"]
    api.app.extensions["sealfold"] = dataclasses.replace(
        ctx, settings=dataclasses.replace(ctx.settings, metrics_token="ops-only"))
    api.problem(api.get(None, "/metrics"), 401)
    reply = api.app.test_client().get("/metrics", headers={"Authorization": "Bearer ops-only"})
    assert reply.status_code == 200


def test_request_id_is_taken_or_made_and_echoed(api: Api) -> None:
    client = api.app.test_client()
    sent = client.get("/healthz", headers={"X-Request-ID": "ci-run-42.fold_3"})
    assert sent.headers["X-Request-ID"] == "ci-run-42.fold_3"
    made = client.get("/healthz", headers={"X-Request-ID": "not acceptable; " * 20})
    assert re.fullmatch(r"[0-9a-f]{32}", made.headers["X-Request-ID"])
    assert client.get("/healthz").headers["X-Request-ID"] != made.headers["X-Request-ID"]


def test_catalog_lists_estimators_transformers_and_metrics(api: Api) -> None:
    reply = api.get("submitter", "/v1/catalog")
    assert reply.status_code == 200
    catalog = reply.get_json()
    names = {e["name"]: e for e in catalog["estimators"]}
    # Ridge and LogisticRegression are scikit-learn linear models (sklearn.linear_model).
    assert names["Ridge"]["task"] == "regression" and names["Ridge"]["linear"] is True
    assert names["LogisticRegression"]["task"] == "classification"
    assert "alpha" in names["Ridge"]["params"]
    assert "StandardScaler" in {t["name"] for t in catalog["transformers"]}
    metrics = {m["name"]: m for m in catalog["metrics"]}
    assert metrics["rmse"]["greater_is_better"] is False and metrics["rmse"]["default"] is True
    assert metrics["roc_auc"]["needs_proba"] is True
    # Choices are listed with what they accept; a quantile has no default and must be declared.
    average = {o["name"]: o for o in metrics["f1"]["options"]}["average"]
    assert average["choices"] == ["binary", "micro", "macro", "weighted"] and average["required"] is False
    alpha = metrics["pinball_loss"]["options"][0]
    assert alpha["name"] == "alpha" and alpha["required"] is True
    assert metrics["matthews_corrcoef"]["bounds"] == [-1.0, 1.0] and metrics["matthews_corrcoef"]["options"] == []
