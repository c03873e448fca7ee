"""Submission behaviour end to end: progress, failing folds, cancel, idempotency, refused configurations."""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from service.records.tables import submissions as submissions_table
from tests.support.datasets import breast_cancer_frame, development, diabetes_frame, fold_indices, register
from tests.support.stack import Stack


@pytest.fixture(scope="module")
def diabetes(stack: Stack) -> dict[str, Any]:
    return register(stack.client("steward"), diabetes_frame(), name="diabetes-subs", target="target",
                    task="regression")


@pytest.fixture(scope="module")
def cancer(stack: Stack) -> dict[str, Any]:
    return register(stack.client("steward"), breast_cancer_frame(), name="bc-subs", target="target",
                    task="classification")


def _count_submissions(stack: Stack) -> int:
    with stack.engine.connect() as conn:
        return int(conn.execute(select(func.count()).select_from(submissions_table)).scalar_one())


def _problem(reply: Any, status: int) -> dict[str, Any]:
    assert reply.status == status, reply.text
    assert reply.headers["content-type"].startswith("application/problem+json")
    return dict(reply.json())


def test_progress_moves_while_folds_finish(stack: Stack) -> None:
    # A few thousand rows and a slowish model, so folds finish at visibly different times.
    rng = np.random.default_rng(11)
    x = rng.normal(size=(4000, 8))
    frame = pd.DataFrame(x, columns=[f"x{i}" for i in range(8)])
    frame["y"] = x @ rng.normal(size=8) + rng.normal(size=4000)
    ds = register(stack.client("steward"), frame, name="progress", target="y", task="regression", folds=6)
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": ds["id"], "model": {"estimator": "GradientBoostingRegressor", "params": {"n_estimators": 120}}})
    assert reply.status == 202, reply.text
    sub_id = reply.json()["id"]
    seen = set()
    deadline = time.monotonic() + 180
    while time.monotonic() < deadline:
        doc = stack.client().get(f"/v1/submissions/{sub_id}").json()
        seen.add(doc["progress"]["folds_done"])
        assert doc["progress"]["folds_total"] == 6
        if doc["state"] in ("succeeded", "failed"):
            break
        time.sleep(0.02)
    assert doc["state"] == "succeeded"
    assert seen & {1, 2, 3, 4, 5}, f"progress never showed a partial count: {sorted(seen)}"
    assert doc["started_at"] <= doc["finished_at"]


def test_some_folds_failing_are_listed_and_the_rest_reported(stack: Stack) -> None:
    # Forward-chaining folds: the earliest fold trains on the fewest rows. KNeighborsRegressor with more
    # neighbours than that fold's training rows fails there (scikit-learn raises) and works on later folds.
    frame = diabetes_frame().iloc[:300].copy()
    frame.insert(0, "seq", np.arange(300))
    ds = register(stack.client("steward"), frame, name="knn-fail", target="target", task="regression",
                  time_column="seq", folds=5)
    first_train = ds["rows"]["development"] // 6
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": ds["id"], "model": {"estimator": "KNeighborsRegressor",
                                       "params": {"n_neighbors": first_train + 5}}})
    assert reply.status == 202, reply.text
    doc = stack.wait_for(reply.json()["id"])
    assert doc["state"] == "succeeded", doc
    folds = doc["result"]["cv"]["folds"]
    failed = [f for f in folds if f["status"] == "failed"]
    assert [f["fold"] for f in failed] == [0]
    assert "n_neighbors" in failed[0]["error"] or "n_samples" in failed[0]["error"]
    assert doc["result"]["cv"]["failures"] and doc["result"]["cv"]["summary"]["rmse"]["mean"] > 0


def test_all_folds_failing_fails_with_the_estimators_message(stack: Stack, diabetes: dict[str, Any]) -> None:
    # 400 neighbours among a fold's ~283 training rows: the fit works (so the trial fit at submission
    # accepts it) and scikit-learn's kneighbors raises in every fold's predict.
    reply = stack.client().post("/v1/submissions", json_body={
        "dataset": diabetes["id"], "model": {"estimator": "KNeighborsRegressor", "params": {"n_neighbors": 400}}})
    assert reply.status == 202, reply.text
    doc = stack.wait_for(reply.json()["id"])
    assert doc["state"] == "failed"
    assert doc["failure_cause"] == "model"  # the model's own error: the submission's result
    assert "n_neighbors" in doc["error"] or "n_samples" in doc["error"], doc["error"]
    assert doc["result"]["holdout"]["released"] is False


def test_a_configuration_that_cannot_fit_at_all_is_refused_at_post(stack: Stack, diabetes: dict[str, Any]) -> None:
    # kernel="precomputed" wants a square Gram matrix; a feature matrix makes scikit-learn's fit raise,
    # so it would fail on every fold: the trial fit on a sample of development rows refuses it now.
    before = _count_submissions(stack)
    problem = _problem(stack.client().post("/v1/submissions", json_body={
        "dataset": diabetes["id"], "model": {"estimator": "SVR", "params": {"kernel": "precomputed"}}}), 422)
    (error,) = problem["errors"]
    assert error["pointer"] == "/model/estimator"
    assert "SVR" in error["detail"] and ("square" in error["detail"].lower() or "precomputed" in error["detail"])
    assert _count_submissions(stack) == before  # nothing half-written


def test_idempotency_key_replays_and_refuses_a_different_body(stack: Stack, diabetes: dict[str, Any]) -> None:
    body = {"dataset": diabetes["id"], "model": {"estimator": "Ridge", "params": {"alpha": 3.0}}}
    headers = {"Idempotency-Key": "ci-run-4711"}
    first = stack.client().post("/v1/submissions", json_body=body, headers=headers)
    again = stack.client().post("/v1/submissions", json_body=body, headers=headers)
    assert first.status == 202 and again.status in (200, 202)
    assert first.json()["id"] == again.json()["id"]
    before = _count_submissions(stack)
    other = stack.client().post("/v1/submissions", json_body={**body, "label": "changed"}, headers=headers)
    _problem(other, 422)
    assert _count_submissions(stack) == before
    stack.wait_for(first.json()["id"])


def test_etag_answers_not_modified(stack: Stack, diabetes: dict[str, Any]) -> None:
    reply = stack.client().post("/v1/submissions", json_body={"dataset": diabetes["id"],
                                                             "model": {"estimator": "LinearRegression"}})
    doc = stack.wait_for(reply.json()["id"])
    first = stack.client().get(f"/v1/submissions/{doc['id']}")
    etag = first.headers["etag"]
    assert stack.client().get(f"/v1/submissions/{doc['id']}", headers={"If-None-Match": etag}).status == 304


def test_cancel_a_queued_submission(stack: Stack, diabetes: dict[str, Any]) -> None:
    slow = {"dataset": diabetes["id"], "model": {"estimator": "RandomForestRegressor",
                                                 "params": {"n_estimators": 400}}, "validation": {"repeats": 3}}
    reply = stack.client().post("/v1/submissions", json_body=slow)
    assert reply.status == 202, reply.text
    sub_id = reply.json()["id"]
    assert stack.client("other_submitter").delete(f"/v1/submissions/{sub_id}").status == 404
    cancel = stack.client().delete(f"/v1/submissions/{sub_id}")
    assert cancel.status in (200, 202), cancel.text
    doc = stack.wait_for(sub_id)
    assert doc["state"] == "canceled"
    time.sleep(1.0)
    later = stack.client().get(f"/v1/submissions/{sub_id}").json()
    assert later["state"] == "canceled" and later["progress"]["folds_done"] < 15
    _problem(stack.client().delete(f"/v1/submissions/{sub_id}"), 409)


@pytest.mark.parametrize(
    ("model", "metrics", "pointer", "words"),
    [
        ({"estimator": "NotAModel"}, None, "/model/estimator", "not in the catalog"),
        ({"estimator": "LogisticRegression"}, None, "/model/estimator", "classification"),
        ({"estimator": "Ridge", "params": {"alpha": -1}}, None, "/model/params/alpha", "alpha"),
        ({"estimator": "Ridge", "params": {"alphaa": 1}}, None, "/model/params/alphaa", "alpha"),
        ({"estimator": "RandomForestRegressor", "params": {"n_estimators": 100000}}, None,
         "/model/params/n_estimators", "500"),
        ({"estimator": "Ridge", "features": ["bmi", "nope"]}, None, "/model/features/1", "nope"),
        ({"estimator": "Ridge", "preprocess": [{"transformer": "Imaginary", "columns": ["bmi"]}]}, None,
         "/model/preprocess/0/transformer", "StandardScaler"),
        ({"estimator": "Ridge"}, ["accuracy"], "/metrics/0", "rmse"),
        ({"estimator": "Ridge"}, ["rmse", "rmsle"], "/metrics/1", "unknown metric 'rmsle'; metrics for regression"),
        ({"estimator": "Ridge"}, [{"name": "pinball_loss"}], "/metrics/0", "needs alpha to be declared"),
    ],
)
def test_refused_configurations_name_the_field(
    stack: Stack, diabetes: dict[str, Any], model: dict[str, Any], metrics: list[str] | None, pointer: str,
    words: str,
) -> None:
    before = _count_submissions(stack)
    body: dict[str, Any] = {"dataset": diabetes["id"], "model": model}
    if metrics is not None:
        body["metrics"] = metrics
    problem = _problem(stack.client().post("/v1/submissions", json_body=body), 422)
    pointers = {e["pointer"]: e["detail"] for e in problem["errors"]}
    assert pointer in pointers, problem
    assert words in pointers[pointer], pointers[pointer]
    assert _count_submissions(stack) == before


def test_probability_metric_refused_for_a_model_without_probabilities(stack: Stack, cancer: dict[str, Any]) -> None:
    body = {"dataset": cancer["id"], "model": {"estimator": "SVC", "params": {"probability": False}},
            "metrics": ["accuracy", "roc_auc"]}
    problem = _problem(stack.client().post("/v1/submissions", json_body=body), 422)
    assert any(e["pointer"] == "/metrics/1" for e in problem["errors"]), problem
    assert "set probability=true in model.params" in problem["detail"]


def test_categorical_feature_without_encoder_is_refused(stack: Stack) -> None:
    frame = diabetes_frame()
    frame["region"] = np.where(frame["sex"] > 0, "north", "south")
    ds = register(stack.client("steward"), frame, name="with-category", target="target", task="regression")
    problem = _problem(stack.client().post("/v1/submissions", json_body={
        "dataset": ds["id"], "model": {"estimator": "Ridge"}}), 422)
    assert any("region" in e["detail"] and "encoder" in e["detail"] for e in problem["errors"]), problem
    ok = stack.client().post("/v1/submissions", json_body={"dataset": ds["id"], "model": {
        "estimator": "Ridge", "preprocess": [{"transformer": "OneHotEncoder", "columns": ["region"]}]}})
    assert ok.status == 202, ok.text
    doc = stack.wait_for(ok.json()["id"])
    assert doc["state"] == "succeeded"
    names = [t["name"] for t in doc["result"]["coefficients"]["terms"]]
    assert any("region" in n for n in names)


def test_pinned_fingerprint_mismatch_is_a_conflict(stack: Stack, diabetes: dict[str, Any]) -> None:
    body = {"dataset": {"id": diabetes["id"], "fingerprint": "0" * 64}, "model": {"estimator": "Ridge"}}
    _problem(stack.client().post("/v1/submissions", json_body=body), 409)
    body["dataset"]["fingerprint"] = diabetes["fingerprint"]
    reply = stack.client().post("/v1/submissions", json_body=body)
    assert reply.status == 202, reply.text
    stack.wait_for(reply.json()["id"])


def test_another_teams_dataset_is_not_found(stack: Stack, diabetes: dict[str, Any]) -> None:
    body = {"dataset": diabetes["id"], "model": {"estimator": "Ridge"}}
    _problem(stack.client("other_submitter").post("/v1/submissions", json_body=body), 404)
    assert stack.client("other_submitter").get(f"/v1/datasets/{diabetes['id']}").status == 404


def test_linear_coefficients_per_fold_with_stability(stack: Stack, diabetes: dict[str, Any]) -> None:
    from sklearn.linear_model import LinearRegression

    reply = stack.client().post("/v1/submissions", json_body={"dataset": diabetes["id"],
                                                             "model": {"estimator": "LinearRegression"}})
    doc = stack.wait_for(reply.json()["id"])
    coefs = doc["result"]["coefficients"]
    assert coefs["folds"] == 5 and len(coefs["terms"]) == 10
    for term in coefs["terms"]:
        values = np.array(term["values"])
        assert term["mean"] == pytest.approx(values.mean(), rel=1e-9)
        assert term["std"] == pytest.approx(values.std(ddof=1), rel=1e-9)
        assert term["sign_stable"] == bool(np.all(np.sign(values) == np.sign(values[0])))
    # Each fold's coefficients are those of scikit-learn's LinearRegression fitted on that fold's training rows.
    dev = development(stack.client(), diabetes["id"])
    features = [c for c in dev.columns if c not in ("row_id", "target")]
    assert [t["name"] for t in coefs["terms"]] == features
    per_fold = np.array([t["values"] for t in coefs["terms"]]).T
    for (train, _), fold_coefs in zip(fold_indices(stack.client(), doc["id"], dev), per_fold, strict=True):
        reference = LinearRegression().fit(dev.iloc[train][features], dev.iloc[train]["target"])
        np.testing.assert_allclose(fold_coefs, reference.coef_, rtol=1e-7)
