"""End to end through HTTP, real Redis and real forking workers, checked against scikit-learn itself.

Reference: for any dataset and fold plan, sealfold's per-fold scores must equal
``sklearn.model_selection.cross_validate`` on the same development rows with the same train/test
indices and the same estimator pipeline (REFERENCES.md, "Reference library: scikit-learn").
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.linear_model import Lasso, LogisticRegression, Ridge
from sklearn.metrics import make_scorer, mean_pinball_loss, mean_tweedie_deviance, precision_score
from sklearn.model_selection import cross_val_predict, cross_validate
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from tests.support.datasets import breast_cancer_frame, development, diabetes_frame, fold_indices, register
from tests.support.stack import Stack

DIABETES_FEATURES = ["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"]


def _submit(stack: Stack, body: dict[str, Any]) -> dict[str, Any]:
    reply = stack.client().post("/v1/submissions", json_body=body)
    assert reply.status == 202, reply.text
    assert reply.headers["location"].endswith(reply.json()["id"])
    return stack.wait_for(reply.json()["id"])


@pytest.fixture(scope="module")
def diabetes(stack: Stack) -> dict[str, Any]:
    ds = register(stack.client("steward"), diabetes_frame(), name="diabetes", target="target",
                  task="regression", folds=5)
    # Release every holdout metric exactly (rounded), so the test can see them all.
    put = stack.client("steward").request("PUT", f"/v1/datasets/{ds['id']}/policy",
                                          json_body={"primary_metric": "rmse", "release": {"mode": "exact"}})
    assert put.status == 200, put.text
    return ds


@pytest.fixture(scope="module")
def cancer(stack: Stack) -> dict[str, Any]:
    return register(stack.client("steward"), breast_cancer_frame(), name="breast-cancer", target="target",
                    task="classification", folds=5)


def test_diabetes_ridge_fold_scores_equal_cross_validate(stack: Stack, diabetes: dict[str, Any]) -> None:
    doc = _submit(stack, {
        "dataset": diabetes["id"],
        "model": {"estimator": "Ridge", "params": {"alpha": 0.5},
                  "preprocess": [{"transformer": "StandardScaler", "columns": DIABETES_FEATURES}]},
        "metrics": ["rmse", "mae", "r2", "mse"],
    })
    assert doc["state"] == "succeeded", doc
    dev = development(stack.client(), diabetes["id"])
    splits = fold_indices(stack.client(), doc["id"], dev)
    reference = cross_validate(
        make_pipeline(StandardScaler(), Ridge(alpha=0.5)), dev[DIABETES_FEATURES], dev["target"], cv=splits,
        scoring={"rmse": "neg_root_mean_squared_error", "mae": "neg_mean_absolute_error", "r2": "r2",
                 "mse": "neg_mean_squared_error"},
    )
    folds = doc["result"]["cv"]["folds"]
    assert len(folds) == 5 == len(splits)
    for i, fold in enumerate(folds):
        assert fold["test_rows"] == len(splits[i][1]) and fold["train_rows"] == len(splits[i][0])
        for metric in ("rmse", "mae", "mse"):
            assert fold["scores"][metric] == pytest.approx(-reference[f"test_{metric}"][i], rel=1e-9)
        assert fold["scores"]["r2"] == pytest.approx(reference["test_r2"][i], rel=1e-9)
    summary = doc["result"]["cv"]["summary"]["r2"]
    assert summary["mean"] == pytest.approx(np.mean(reference["test_r2"]), rel=1e-9)
    assert summary["min"] <= summary["mean"] <= summary["max"]
    # The holdout part is aggregate scores only.
    holdout = doc["result"]["holdout"]
    assert holdout["released"] is True and set(holdout["scores"]) == {"rmse", "mae", "r2", "mse"}


def test_breast_cancer_logistic_fold_scores_equal_cross_validate(stack: Stack, cancer: dict[str, Any]) -> None:
    features = [c for c in breast_cancer_frame().columns if c != "target"]
    doc = _submit(stack, {
        "dataset": cancer["id"],
        "model": {"estimator": "LogisticRegression", "params": {"C": 0.3, "max_iter": 2000},
                  "preprocess": [{"transformer": "StandardScaler", "columns": features}]},
        "metrics": ["accuracy", "roc_auc", "log_loss", "balanced_accuracy", "f1", "brier"],
    })
    assert doc["state"] == "succeeded", doc
    dev = development(stack.client(), cancer["id"])
    splits = fold_indices(stack.client(), doc["id"], dev)
    reference = cross_validate(
        make_pipeline(StandardScaler(), LogisticRegression(C=0.3, max_iter=2000)), dev[features], dev["target"],
        cv=splits, scoring={"accuracy": "accuracy", "roc_auc": "roc_auc", "log_loss": "neg_log_loss",
                            "balanced_accuracy": "balanced_accuracy", "f1": "f1", "brier": "neg_brier_score"},
    )
    # "f1" is stored with its choice spelled out: binary averaging on the larger label (1).
    f1 = "f1(average=binary;pos_label=1)"
    assert doc["config"]["metrics"] == ["accuracy", "roc_auc", "log_loss", "balanced_accuracy", f1, "brier"]
    for i, fold in enumerate(doc["result"]["cv"]["folds"]):
        assert fold["scores"][f1] == pytest.approx(reference["test_f1"][i], rel=1e-9)
        for metric in ("accuracy", "roc_auc", "balanced_accuracy"):
            assert fold["scores"][metric] == pytest.approx(reference[f"test_{metric}"][i], rel=1e-9)
        for metric in ("log_loss", "brier"):
            assert fold["scores"][metric] == pytest.approx(-reference[f"test_{metric}"][i], rel=1e-9)
    # Stratified plan: every fold keeps the class balance within one row per class (common practice check).
    y = dev["target"].to_numpy()
    for _, test in splits:
        assert abs(y[test].mean() - y.mean()) < 0.03


def test_metric_choices_and_calibration_on_breast_cancer(stack: Stack, cancer: dict[str, Any]) -> None:
    # Reference: cross_validate with scikit-learn's scorers for the same choices, on the served folds;
    # calibration_curve(n_bins=10) on cross_val_predict's out-of-fold probabilities.
    features = [c for c in breast_cancer_frame().columns if c != "target"]
    doc = _submit(stack, {
        "dataset": cancer["id"],
        "model": {"estimator": "LogisticRegression", "params": {"C": 0.05, "max_iter": 2000},
                  "preprocess": [{"transformer": "StandardScaler", "columns": features}]},
        "metrics": [{"name": "precision", "pos_label": 0}, "recall(average=weighted)", "matthews_corrcoef",
                    "average_precision"],
    })
    assert doc["state"] == "succeeded", doc
    keys = ["precision(average=binary;pos_label=0)", "recall(average=weighted)", "matthews_corrcoef",
            "average_precision(pos_label=1)", "accuracy"]  # accuracy: the default policy's primary metric
    assert doc["config"]["metrics"] == keys
    dev = development(stack.client(), cancer["id"])
    splits = fold_indices(stack.client(), doc["id"], dev)
    model = make_pipeline(StandardScaler(), LogisticRegression(C=0.05, max_iter=2000))
    scoring = {"p": make_scorer(precision_score, pos_label=0), "r": "recall_weighted", "m": "matthews_corrcoef",
               "ap": "average_precision"}
    reference = cross_validate(model, dev[features], dev["target"], cv=splits, scoring=scoring)
    for i, fold in enumerate(doc["result"]["cv"]["folds"]):
        for key, short in zip(keys, scoring, strict=False):
            assert fold["scores"][key] == pytest.approx(reference[f"test_{short}"][i], rel=1e-9), key
    calibration = doc["result"]["calibration"]
    oof = cross_val_predict(model, dev[features], dev["target"], cv=splits, method="predict_proba")[:, 1]
    observed, predicted = calibration_curve(dev["target"], oof, n_bins=10)
    used = [b for b in calibration["curve"] if b["count"]]
    np.testing.assert_allclose([b["fraction_observed"] for b in used], observed, rtol=1e-12)
    np.testing.assert_allclose([b["mean_predicted"] for b in used], predicted, rtol=1e-9)
    assert calibration["rows"] == len(dev) and 0.0 <= calibration["ece"] <= 1.0
    # Direction and range as the summary reports them: Matthews in [-1, 1], the rest in [0, 1].
    for key in keys:
        low, high = doc["result"]["cv"]["summary"][key]["naive_interval_95"]
        assert (-1.0 if key == "matthews_corrcoef" else 0.0) <= low <= high <= 1.0


def test_regression_metric_choices_on_diabetes(stack: Stack, diabetes: dict[str, Any]) -> None:
    doc = _submit(stack, {
        "dataset": diabetes["id"],
        "model": {"estimator": "Ridge", "params": {"alpha": 0.5},
                  "preprocess": [{"transformer": "StandardScaler", "columns": DIABETES_FEATURES}]},
        "metrics": [{"name": "pinball_loss", "alpha": 0.8}, "median_absolute_error", "mape",
                    "tweedie_deviance(power=1.5)", "explained_variance"],
    })
    assert doc["state"] == "succeeded", doc
    keys = ["pinball_loss(alpha=0.8)", "median_absolute_error", "mape", "tweedie_deviance(power=1.5)",
            "explained_variance", "rmse"]  # rmse: the dataset policy's primary metric
    assert doc["config"]["metrics"] == keys
    dev = development(stack.client(), diabetes["id"])
    splits = fold_indices(stack.client(), doc["id"], dev)
    scoring = {"q": make_scorer(mean_pinball_loss, alpha=0.8), "med": "neg_median_absolute_error",
               "mape": "neg_mean_absolute_percentage_error", "tw": make_scorer(mean_tweedie_deviance, power=1.5),
               "ev": "explained_variance"}
    sign = {"q": 1.0, "med": -1.0, "mape": -1.0, "tw": 1.0, "ev": 1.0}
    reference = cross_validate(make_pipeline(StandardScaler(), Ridge(alpha=0.5)), dev[DIABETES_FEATURES],
                               dev["target"], cv=splits, scoring=scoring)
    for i, fold in enumerate(doc["result"]["cv"]["folds"]):
        for key, short in zip(keys, scoring, strict=False):
            assert fold["scores"][key] == pytest.approx(sign[short] * reference[f"test_{short}"][i], rel=1e-9)
    assert doc["result"]["calibration"] is None


def test_baseline_is_dummy_on_the_same_folds(stack: Stack, diabetes: dict[str, Any]) -> None:
    from sklearn.dummy import DummyRegressor

    doc = _submit(stack, {"dataset": diabetes["id"], "model": {"estimator": "LinearRegression"},
                          "metrics": ["r2"]})
    dev = development(stack.client(), diabetes["id"])
    splits = fold_indices(stack.client(), doc["id"], dev)
    reference = cross_validate(DummyRegressor(), dev[DIABETES_FEATURES], dev["target"], cv=splits, scoring="r2")
    baseline = [f["baseline_scores"]["r2"] for f in doc["result"]["cv"]["folds"]]
    np.testing.assert_allclose(baseline, reference["test_score"], rtol=1e-9)
    assert doc["result"]["baseline"]["estimator"] == "DummyRegressor"


def test_lasso_values_from_the_scikit_learn_documentation(stack: Stack) -> None:
    """cross_val_score(Lasso(), X[:150], y[:150], cv=3) on diabetes -> [0.3315057, 0.08022103, 0.03531816]

    (scikit-learn documentation of ``cross_val_score``). The first 150 rows become the development
    partition by sealing the 50 latest rows of a 200-row table on a row-order column, and the fold plan
    is contiguous (unshuffled) 3-fold, as ``cv=3`` is.
    """
    frame = diabetes_frame().iloc[:200].copy()
    frame.insert(0, "seq", np.arange(200))
    ds = register(stack.client("steward"), frame, name="diabetes-200", target="target", task="regression",
                  time_column="seq", holdout_scheme="time", holdout_fraction=0.25, folds=3,
                  fold_scheme="contiguous")
    assert ds["rows"] == {"total": 200, "development": 150, "holdout": 50}
    doc = _submit(stack, {"dataset": ds["id"], "model": {"estimator": "Lasso", "features": DIABETES_FEATURES},
                          "metrics": ["r2"]})
    scores = [f["scores"]["r2"] for f in doc["result"]["cv"]["folds"]]
    np.testing.assert_allclose(scores, [0.3315057, 0.08022103, 0.03531816], atol=5e-8)
    # And the same through scikit-learn on what the service serves, as a cross-check of the download.
    dev = development(stack.client(), ds["id"])
    reference = cross_validate(Lasso(), dev[DIABETES_FEATURES], dev["target"], cv=3, scoring="r2")
    np.testing.assert_allclose(scores, reference["test_score"], rtol=1e-9)


def test_nested_search_and_learning_curve_through_the_queue(stack: Stack, diabetes: dict[str, Any]) -> None:
    """Outer-fold scores of a nested search equal cross_validate(GridSearchCV(...)) on the same folds, and the
    learning curve equals scikit-learn's learning_curve on them (both through HTTP and real workers)."""
    from sklearn.model_selection import GridSearchCV, KFold, learning_curve

    doc = _submit(stack, {
        "dataset": diabetes["id"], "model": {"estimator": "Ridge", "features": DIABETES_FEATURES},
        "search": {"grid": {"alpha": [0.01, 0.1, 1.0, 10.0]}, "inner_folds": 3},
        "metrics": ["rmse"], "validation": {"learning_curve": [0.5, 1.0]},
    })
    assert doc["state"] == "succeeded", doc
    dev = development(stack.client(), diabetes["id"])
    splits = fold_indices(stack.client(), doc["id"], dev)
    X, y = dev[DIABETES_FEATURES], dev["target"]
    seed = diabetes["fold_plan"]["seed"]
    search = GridSearchCV(Ridge(), {"alpha": [0.01, 0.1, 1.0, 10.0]}, scoring="neg_root_mean_squared_error",
                          cv=KFold(3, shuffle=True, random_state=seed))
    reference = cross_validate(search, X, y, cv=splits, scoring="neg_root_mean_squared_error")
    ours = [f["scores"]["rmse"] for f in doc["result"]["cv"]["folds"]]
    np.testing.assert_allclose(ours, -reference["test_score"], rtol=1e-9)
    curve_doc = _submit(stack, {"dataset": diabetes["id"],
                                "model": {"estimator": "Ridge", "features": DIABETES_FEATURES},
                                "metrics": ["rmse"], "validation": {"learning_curve": [0.5, 1.0]}})
    # learning_curve(shuffle=True) permutes each split's training indices and fits on their prefixes; the
    # service's permutation is numpy's default_rng([plan seed, repeat, fold]), applied here to the splits
    # before learning_curve (shuffle=False) takes the same prefixes.
    shuffled = [(np.random.default_rng([seed, 0, k]).permutation(train), test)
                for k, (train, test) in enumerate(splits)]
    _, train_scores, test_scores = learning_curve(Ridge(), X, y, cv=shuffled, train_sizes=[0.5, 1.0],
                                                  scoring="neg_root_mean_squared_error")
    points = curve_doc["result"]["learning_curve"]
    assert [p["fraction"] for p in points] == [0.5, 1.0]
    # The folds here differ in size by at most one row, so the first-split sizes scikit-learn uses match.
    np.testing.assert_allclose([p["validation_mean"]["rmse"] for p in points], -test_scores.mean(axis=1), rtol=1e-6)
    np.testing.assert_allclose([p["train_mean"]["rmse"] for p in points], -train_scores.mean(axis=1), rtol=1e-6)
