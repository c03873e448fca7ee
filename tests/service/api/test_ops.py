"""Liveness, readiness, metrics and the catalog listing."""

from __future__ import annotations

import dataclasses
import re
from typing import TYPE_CHECKING

from redis import Redis

if TYPE_CHECKING:
    from tests.support.api import Api



def test_healthz_needs_no_key_and_no_backend(api: Api) -> None:
    reply = api.get(None, "/healthz")
    assert reply.status_code == 200 and reply.get_json() == {"status": "ok"}


def test_readyz_checks_database_and_redis(api: Api) -> None:
    reply = api.get(None, "/readyz")
    assert reply.status_code == 200, reply.get_data(as_text=True)
    assert reply.get_json()["checks"] == {"database": "ok", "redis": "ok"}
    ctx = api.app.extensions["sealfold"]
    # Port 1 is never a Redis server: the ping fails fast with a refused connection.
    api.app.extensions["sealfold"] = dataclasses.replace(
        ctx, redis=Redis.from_url("redis://127.0.0.1:1/0", socket_connect_timeout=0.5))
    problem = api.problem(api.get(None, "/readyz"), 503)
    assert "redis" in problem["detail"] and "database" not in problem["detail"]


def test_metrics_are_prometheus_text(api: Api) -> None:
    api.get(None, "/healthz")
    api.get(None, "/healthz")
    api.get(None, "/v1/catalog")
    reply = api.get(None, "/metrics")
    assert reply.status_code == 200
    assert reply.headers["Content-Type"].startswith("text/plain; version=0.0.4")
    text = reply.get_data(as_text=True)
    # Prometheus exposition format: "# TYPE name kind" then "name{labels} value" lines.
    assert "# TYPE sealfold_submissions gauge" in text
    assert 'sealfold_submissions{state="queued"} 0' in text
    assert 'sealfold_http_requests_total{method="GET",route="/healthz",status="200"} 2' in text
    assert 'sealfold_http_requests_total{method="GET",route="/v1/catalog",status="401"} 1' in text
    sample = re.compile(r'^[a-z_]+(\{([a-z_]+="[^"]*",?)+\})? \d+$')
    for line in text.splitlines():
        assert line.startswith("# ") or sample.match(line), line


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
