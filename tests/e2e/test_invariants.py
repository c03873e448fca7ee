"""The promises of the seal and of the fold plan, checked end to end through HTTP.

Invariants in the style of scikit-learn's own split tests: the holdout never inside any fold, folds
disjoint and covering the development rows, same plan same folds, group and time schemes keeping
their promise -- and nothing that leaves the service names a holdout row.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd
import pytest
from redis import Redis
from rq import Queue
from rq.serializers import JSONSerializer

from tests.support.datasets import breast_cancer_frame, development, diabetes_frame, register
from tests.support.stack import Stack


def _submit(stack: Stack, body: dict[str, Any], who: str = "submitter") -> dict[str, Any]:
    reply = stack.client(who).post("/v1/submissions", json_body=body)
    assert reply.status == 202, reply.text
    return reply.json()


def _folds(stack: Stack, sub_id: str) -> list[dict[str, Any]]:
    reply = stack.client().get(f"/v1/submissions/{sub_id}/folds")
    assert reply.status == 200, reply.text
    return sorted(reply.json()["folds"], key=lambda f: (f["repeat"], f["fold"]))


def _with_ids(frame: pd.DataFrame, prefix: str) -> pd.DataFrame:
    out = frame.copy()
    out.insert(0, "case_id", [f"{prefix}-{i:05d}" for i in range(len(out))])
    return out


@pytest.fixture(scope="module")
def cancer_with_ids(stack: Stack) -> tuple[dict[str, Any], pd.DataFrame]:
    frame = _with_ids(breast_cancer_frame(), "bc")
    ds = register(stack.client("steward"), frame, name="bc-ids", target="target", task="classification",
                  id_column="case_id")
    return ds, frame


def test_holdout_rows_never_leave_and_folds_partition_development(
    stack: Stack, cancer_with_ids: tuple[dict[str, Any], pd.DataFrame]
) -> None:
    ds, frame = cancer_with_ids
    dev = development(stack.client(), ds["id"])
    all_ids = set(frame["case_id"])
    dev_ids = set(dev["row_id"])
    holdout_ids = all_ids - dev_ids
    # Default fraction under 100k rows is 20 % (common practice, no published source).
    assert len(holdout_ids) == ds["rows"]["holdout"] == round(0.2 * len(frame))
    assert list(dev.columns[:1]) == ["row_id"] and len(dev) == ds["rows"]["development"]

    body = {"dataset": ds["id"], "model": {"estimator": "LogisticRegression", "params": {"max_iter": 3000}},
            "metrics": ["accuracy"]}
    sub = _submit(stack, body)
    doc = stack.wait_for(sub["id"])
    assert doc["state"] == "succeeded", doc
    folds = _folds(stack, sub["id"])
    tested = [set(f["test_row_ids"]) for f in folds]
    for i, a in enumerate(tested):
        assert not a & holdout_ids, "a holdout row appears in a fold"
        for b in tested[i + 1:]:
            assert not a & b, "folds overlap"
    assert set().union(*tested) == dev_ids, "folds do not cover the development rows"

    # No response names a holdout row: scan every document a submitter can read.
    client = stack.client()
    texts = [json.dumps(doc), json.dumps(ds), client.get(f"/v1/datasets/{ds['id']}").text,
             client.get("/v1/submissions").text, client.get(f"/v1/submissions/{sub['id']}/folds").text,
             client.get(f"/v1/datasets/{ds['id']}/development").text]
    for text in texts:
        leaked = [h for h in holdout_ids if h in text]
        assert not leaked, f"holdout ids leaked: {leaked[:3]}"
    assert "sealing_seed" not in texts[2] and "holdout_fingerprint" not in texts[2]


def test_same_plan_gives_the_same_folds(stack: Stack, cancer_with_ids: tuple[dict[str, Any], pd.DataFrame]) -> None:
    ds, _ = cancer_with_ids
    a = _submit(stack, {"dataset": ds["id"], "model": {"estimator": "DummyClassifier"}, "label": "a"})
    b = _submit(stack, {"dataset": ds["id"], "model": {"estimator": "DecisionTreeClassifier",
                                                       "params": {"max_depth": 2}}, "label": "b"})
    assert _folds(stack, a["id"]) == _folds(stack, b["id"])
    stack.wait_for(a["id"]), stack.wait_for(b["id"])


def test_group_scheme_keeps_groups_on_one_side(stack: Stack) -> None:
    frame = _with_ids(diabetes_frame(), "dg")
    frame["clinic"] = [f"clinic-{i % 37:02d}" for i in range(len(frame))]
    ds = register(stack.client("steward"), frame, name="diabetes-groups", target="target", task="regression",
                  id_column="case_id", group_column="clinic")
    assert ds["holdout"]["scheme"] == "group" and ds["fold_plan"]["scheme"] == "group"
    dev = development(stack.client(), ds["id"])
    holdout_groups = set(frame.loc[~frame["case_id"].isin(dev["row_id"]), "clinic"])
    assert holdout_groups and not holdout_groups & set(dev["clinic"])
    sub = _submit(stack, {"dataset": ds["id"], "model": {"estimator": "Ridge"}, "metrics": ["r2"]})
    group_of = dict(zip(dev["row_id"], dev["clinic"], strict=True))
    for fold in _folds(stack, sub["id"]):
        test_groups = {group_of[r] for r in fold["test_row_ids"]}
        train_groups = {group_of[r] for r in dev["row_id"] if r not in set(fold["test_row_ids"])}
        assert not test_groups & train_groups
    assert stack.wait_for(sub["id"])["state"] == "succeeded"


def test_time_scheme_holds_out_the_latest_and_never_trains_on_the_future(stack: Stack) -> None:
    frame = _with_ids(diabetes_frame(), "dt")
    rng = np.random.default_rng(3)
    frame["visit_day"] = pd.Timestamp("2026-01-01") + pd.to_timedelta(rng.permutation(len(frame)), unit="D")
    ds = register(stack.client("steward"), frame, name="diabetes-time", target="target", task="regression",
                  id_column="case_id", time_column="visit_day")
    assert ds["holdout"]["scheme"] == "time" and ds["fold_plan"]["scheme"] == "time"
    dev = development(stack.client(), ds["id"])
    dev_times = pd.to_datetime(dev["visit_day"])
    holdout_times = frame.loc[~frame["case_id"].isin(dev["row_id"]), "visit_day"]
    assert dev_times.max() < holdout_times.min()
    sub = _submit(stack, {"dataset": ds["id"], "model": {"estimator": "Ridge"}, "metrics": ["r2"]})
    doc = stack.wait_for(sub["id"])
    time_of = dict(zip(dev["row_id"], dev_times, strict=True))
    for fold, result in zip(_folds(stack, sub["id"]), doc["result"]["cv"]["folds"], strict=True):
        test_times = [time_of[r] for r in fold["test_row_ids"]]
        # forward chaining: every training row is earlier than every test row of its fold
        earlier = sum(t < min(test_times) for t in time_of.values())
        assert result["train_rows"] == earlier


def test_holdout_job_run_twice_scores_once(stack: Stack, cancer_with_ids: tuple[dict[str, Any], pd.DataFrame]) -> None:
    from service.records import audit, submissions

    ds, _ = cancer_with_ids
    sub = _submit(stack, {"dataset": ds["id"], "model": {"estimator": "KNeighborsClassifier"},
                          "metrics": ["accuracy", "roc_auc"]})
    first = stack.wait_for(sub["id"])
    stored = submissions.get_holdout(stack.engine, sub["id"])
    assert stored is not None
    # Run the holdout job again through the real queue, as a retry or a duplicate would.
    queue = Queue(stack.settings.queue_name, connection=Redis.from_url(stack.settings.redis_url),
                  serializer=JSONSerializer)
    job = queue.enqueue_call("worker.jobs.score_holdout", args=(sub["id"],), job_id=f"{sub['id']}-holdout-again")
    result = job.latest_result(timeout=60)
    assert result is not None and result.type == result.Type.SUCCESSFUL, stack.log_path.read_text()[-2000:]
    again = submissions.get_holdout(stack.engine, sub["id"])
    assert again == stored
    scored = [e for e in audit.events_for(stack.engine, sub["id"]) if e["action"] == "holdout.scored"]
    assert len(scored) == 1
    assert stack.wait_for(sub["id"])["result"]["holdout"] == first["result"]["holdout"]
