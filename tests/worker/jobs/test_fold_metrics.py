"""Fold jobs score the metrics with declared choices as cross_validate does, and pool calibration bins.

References: sklearn.model_selection.cross_validate with scorers made from sklearn.metrics functions
(``make_scorer`` with the same arguments) on the vault's own splits, and
sklearn.calibration.calibration_curve on the out-of-fold probabilities of cross_val_predict.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from sklearn import metrics as skm
from sklearn.calibration import calibration_curve
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.model_selection import KFold, cross_val_predict, cross_validate
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.submission.dispatch import fold_cells
from service.submission.resolved import ValidationPlan
from service.vault.folds import FoldPlan, fold_splits, split_keys_from_frame
from tests.support.folds import diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker.jobs.runtime import WorkerContext
from worker.jobs.summary import summary_document


def _classification(ctx: WorkerContext, frame: Any, metrics: list[str], folds: int) -> tuple[Any, ...]:
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    frame = frame.sort_values("target", kind="stable")  # sorted by class, as real exports often are
    order = np.random.default_rng(0).permutation(len(frame))
    cut = int(len(frame) * 0.85)
    dev, hold = frame.iloc[np.sort(order[:cut])], frame.iloc[np.sort(order[cut:])]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=folds, seed=5)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, "LogisticRegression", params={"C": 0.3, "max_iter": 5000},
                             features=features, metrics=metrics,
                             preprocess=[{"transformer": "StandardScaler", "columns": features}])
    rows = run_all_folds(add_submission(ctx, dataset, config), folds)
    plan = FoldPlan("stratified", folds, 5)
    cv = [(s.train, s.test) for s in fold_splits(plan, split_keys_from_frame(dev, plan, "target", None, None))]
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    return rows, X, y, cv, make_pipeline(StandardScaler(), LogisticRegression(C=0.3, max_iter=5000))


def test_binary_choices_and_calibration_on_breast_cancer(ctx: WorkerContext) -> None:
    metrics = ["precision(average=binary;pos_label=0)", "recall(average=weighted)", "f1(average=macro)",
               "matthews_corrcoef", "average_precision(pos_label=1)", "balanced_accuracy"]
    rows, X, y, cv, model = _classification(ctx, load_breast_cancer(as_frame=True).frame, metrics, 4)
    scoring = {
        metrics[0]: skm.make_scorer(skm.precision_score, pos_label=0), metrics[1]: "recall_weighted",
        metrics[2]: "f1_macro", metrics[3]: "matthews_corrcoef", metrics[4]: "average_precision",
        metrics[5]: "balanced_accuracy",
    }
    reference = cross_validate(model, X, y, cv=cv, scoring=scoring)
    for k, row in enumerate(rows):
        assert row["status"] == "ok", row["error"]
        for name in metrics:
            assert row["scores"][name] == pytest.approx(reference[f"test_{name}"][k], rel=1e-9), name

    # The pooled reliability curve is calibration_curve on the concatenated out-of-fold probabilities.
    summary = summary_document(rows, fold_cells(ValidationPlan("stratified", 4, 5)), metrics, "classification")
    calibration = summary["calibration"]
    oof = cross_val_predict(model, X, y, cv=cv, method="predict_proba")[:, 1]
    observed, predicted = calibration_curve(y, oof, n_bins=10, strategy="uniform")
    used = [b for b in calibration["curve"] if b["count"]]
    np.testing.assert_allclose([b["fraction_observed"] for b in used], observed, rtol=1e-12)
    np.testing.assert_allclose([b["mean_predicted"] for b in used], predicted, rtol=1e-9)
    assert calibration["kind"] == "positive_class" and calibration["positive_class"] == "1"
    assert calibration["rows"] == len(y) and sum(b["count"] for b in calibration["curve"]) == len(y)
    # ECE (Naeini et al. 2015), computed from its definition on the same ten bins.
    counts = np.array([b["count"] for b in used])
    assert calibration["ece"] == pytest.approx(float(np.sum(counts / len(y) * np.abs(observed - predicted))),
                                               rel=1e-9)
    assert [(f["repeat"], f["fold"]) for f in calibration["folds"]] == [(0, k) for k in range(4)]


def test_multiclass_choices_and_top_label_calibration_on_wine(ctx: WorkerContext) -> None:
    metrics = ["precision(average=micro)", "f1(average=weighted)", "average_precision(average=macro)",
               "matthews_corrcoef"]
    rows, X, y, cv, model = _classification(ctx, load_wine(as_frame=True).frame, metrics, 3)
    scoring = {metrics[0]: "precision_micro", metrics[1]: "f1_weighted",
               metrics[2]: skm.make_scorer(skm.average_precision_score, response_method="predict_proba",
                                           average="macro"),
               metrics[3]: "matthews_corrcoef"}
    reference = cross_validate(model, X, y, cv=cv, scoring=scoring)
    for k, row in enumerate(rows):
        for name in metrics:
            assert row["scores"][name] == pytest.approx(reference[f"test_{name}"][k], rel=1e-9), name
    summary = summary_document(rows, fold_cells(ValidationPlan("stratified", 3, 5)), metrics, "classification")
    proba = cross_val_predict(model, X, y, cv=cv, method="predict_proba")
    right = (proba.argmax(axis=1) == y).astype(int)  # wine's classes are 0, 1, 2: argmax is the label
    observed, predicted = calibration_curve(right, proba.max(axis=1), n_bins=10, strategy="uniform")
    used = [b for b in summary["calibration"]["curve"] if b["count"]]
    assert summary["calibration"]["kind"] == "top_label"
    np.testing.assert_allclose([b["fraction_observed"] for b in used], observed, rtol=1e-12)
    np.testing.assert_allclose([b["mean_predicted"] for b in used], predicted, rtol=1e-9)


def test_regression_choices_on_diabetes(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=11)
    features = [c for c in dev.columns if c != "target"]
    metrics = ["pinball_loss(alpha=0.9)", "median_absolute_error", "mape", "explained_variance",
               "poisson_deviance", "gamma_deviance", "tweedie_deviance(power=1.5)"]
    config = config_document(dataset, "Ridge", params={"alpha": 0.3}, features=features, metrics=metrics,
                             preprocess=[{"transformer": "StandardScaler", "columns": features}])
    rows = run_all_folds(add_submission(ctx, dataset, config), 5)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(5, shuffle=True, random_state=11).split(X))  # the vault's "kfold" plan
    scoring = {
        metrics[0]: skm.make_scorer(skm.mean_pinball_loss, alpha=0.9), metrics[1]: "neg_median_absolute_error",
        metrics[2]: "neg_mean_absolute_percentage_error", metrics[3]: "explained_variance",
        metrics[4]: "neg_mean_poisson_deviance", metrics[5]: "neg_mean_gamma_deviance",
        metrics[6]: skm.make_scorer(skm.mean_tweedie_deviance, power=1.5),
    }
    reference = cross_validate(make_pipeline(StandardScaler(), Ridge(alpha=0.3)), X, y, cv=cv, scoring=scoring)
    sign = {m: -1.0 if m.startswith(("median", "mape", "poisson", "gamma")) else 1.0 for m in metrics}
    for k, row in enumerate(rows):
        assert row["status"] == "ok", row["error"]
        assert row["calibration"] is None  # regression: nothing to bin
        for name in metrics:
            assert row["scores"][name] == pytest.approx(sign[name] * reference[f"test_{name}"][k], rel=1e-9), name
