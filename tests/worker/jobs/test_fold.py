"""Fold jobs: per-fold scores equal sklearn.model_selection.cross_validate on the same indices."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.compose import ColumnTransformer
from sklearn.datasets import load_breast_cancer
from sklearn.dummy import DummyClassifier, DummyRegressor
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.model_selection import KFold, cross_validate
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import OneHotEncoder, StandardScaler

from service.records import submissions
from service.vault.folds import FoldPlan, fold_splits, split_keys_from_frame
from service.vocabulary import LIVE_STATES
from tests.support.folds import REGRESSION_SCORING, SIGN, diabetes_parts, ridge_on_diabetes, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext


def test_ridge_on_diabetes_equals_cross_validate(ctx: WorkerContext) -> None:
    _, rows, reference, features, (X, y, cv) = ridge_on_diabetes(ctx)
    baseline = cross_validate(DummyRegressor(strategy="mean"), X, y, cv=cv, scoring=REGRESSION_SCORING)
    assert [(r["repeat"], r["fold"], r["status"]) for r in rows] == [(0, f, "ok") for f in range(5)]
    for k, row in enumerate(rows):
        assert row["train_rows"] == len(cv[k][0]) and row["test_rows"] == len(cv[k][1])
        for name in REGRESSION_SCORING:
            expected = SIGN[name] * reference[f"test_{name}"][k]
            assert row["scores"][name] == pytest.approx(expected, rel=1e-10), (k, name)
            assert row["baseline_scores"][name] == pytest.approx(SIGN[name] * baseline[f"test_{name}"][k],
                                                                 rel=1e-10)
        coefficients = row["coefficients"]
        assert coefficients["names"] == features and coefficients["outputs"] == ["target"]
        np.testing.assert_allclose(coefficients["values"][0], reference["estimator"][k][-1].coef_, rtol=1e-10)
        assert row["fit_seconds"] > 0 and row["score_seconds"] > 0


def test_logistic_on_breast_cancer_equals_cross_validate(ctx: WorkerContext) -> None:
    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    dev, hold = frame.iloc[:480], frame.iloc[480:]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=4, seed=3)
    features = [c for c in dev.columns if c != "target"]
    metrics = ["accuracy", "balanced_accuracy", "f1", "roc_auc", "log_loss", "brier"]
    config = config_document(dataset, "LogisticRegression", params={"C": 0.5, "max_iter": 5000},
                             features=features, metrics=metrics,
                             preprocess=[{"transformer": "StandardScaler", "columns": features}])
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 4)

    # Reference: cross_validate with the vault's own stratified splits (same train/test indices).
    plan = FoldPlan("stratified", 4, 3)
    splits = fold_splits(plan, split_keys_from_frame(dev, plan, "target", None, None))
    cv = [(s.train, s.test) for s in splits]
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    scoring = {"accuracy": "accuracy", "balanced_accuracy": "balanced_accuracy", "f1": "f1",
               "roc_auc": "roc_auc", "log_loss": "neg_log_loss", "brier": "neg_brier_score"}
    reference = cross_validate(make_pipeline(StandardScaler(), LogisticRegression(C=0.5, max_iter=5000)),
                               X, y, cv=cv, scoring=scoring, return_estimator=True)
    baseline = cross_validate(DummyClassifier(strategy="prior"), X, y, cv=cv, scoring=scoring)
    for k, row in enumerate(rows):
        assert row["status"] == "ok", row["error"]
        for name in metrics:
            assert row["scores"][name] == pytest.approx(SIGN[name] * reference[f"test_{name}"][k], rel=1e-9)
            assert row["baseline_scores"][name] == pytest.approx(SIGN[name] * baseline[f"test_{name}"][k],
                                                                 rel=1e-9)
        # Binary logistic regression has one coefficient row: the log-odds of classes_[1] (= 1).
        assert row["coefficients"]["outputs"] == ["1"]
        np.testing.assert_allclose(row["coefficients"]["values"], reference["estimator"][k][-1].coef_, rtol=1e-8)


def test_categorical_features_go_through_a_frame(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dev, hold = dev.copy(), hold.copy()
    for part in (dev, hold):
        part["sex"] = pd.Series(np.where(part["sex"] > 0, "f", "m"), index=part.index, dtype="str")
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=5)
    numeric = ["age", "bmi", "bp", "s1", "s5"]
    features = ["sex", *numeric, "s6"]  # s6 is in no step: it passes through
    config = config_document(dataset, "Ridge", features=features, metrics=["rmse", "r2"], preprocess=[
        {"transformer": "OneHotEncoder", "columns": ["sex"], "params": {"handle_unknown": "ignore"}},
        {"transformer": "StandardScaler", "columns": numeric},
    ])
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 3)

    # Reference: cross_validate of the same ColumnTransformer pipeline built by hand, KFold(3, shuffle, 5).
    X, y = dev[features], dev["target"].to_numpy()
    cv = list(KFold(3, shuffle=True, random_state=5).split(X))
    reference_pipeline = make_pipeline(
        ColumnTransformer([("oh", OneHotEncoder(handle_unknown="ignore"), ["sex"]),
                           ("sc", StandardScaler(), numeric)], remainder="passthrough"),
        Ridge(random_state=0),
    )
    reference = cross_validate(reference_pipeline, X, y, cv=cv, scoring={"rmse": "neg_root_mean_squared_error",
                                                                         "r2": "r2"})
    for k, row in enumerate(rows):
        assert row["scores"]["rmse"] == pytest.approx(-reference["test_rmse"][k], rel=1e-10)
        assert row["scores"]["r2"] == pytest.approx(reference["test_r2"][k], rel=1e-10)
        assert row["coefficients"]["names"] == ["sex_f", "sex_m", *numeric, "s6"]


@pytest.mark.parametrize("features", [
    ["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"],  # every feature in stored order
    ["s5", "bmi", "bp", "age"],  # a subset out of stored order
], ids=["stored-order", "reordered-subset"])
def test_numeric_features_without_steps_equal_the_bare_estimator(
    ctx: WorkerContext, features: list[str]
) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=4, seed=9)
    config = config_document(dataset, "Ridge", params={"alpha": 2.0}, features=features,
                             metrics=list(REGRESSION_SCORING))
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 4)

    # Reference: cross_validate of Ridge alone on the same columns, KFold(4, shuffle=True, random_state=9).
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(4, shuffle=True, random_state=9).split(X))
    reference = cross_validate(Ridge(alpha=2.0), X, y, cv=cv, scoring=REGRESSION_SCORING, return_estimator=True)
    for k, row in enumerate(rows):
        assert row["status"] == "ok" and row["train_rows"] == len(cv[k][0]), row["error"]
        for name in REGRESSION_SCORING:
            assert row["scores"][name] == pytest.approx(SIGN[name] * reference[f"test_{name}"][k], rel=1e-10)
        assert row["coefficients"]["names"] == features
        np.testing.assert_allclose(row["coefficients"]["values"][0], reference["estimator"][k].coef_, rtol=1e-10)


def test_estimator_error_is_a_failed_fold_not_a_crash(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge",
                                                          params={"positive": True, "solver": "svd"}))
    answer = jobs.run_fold(sub_id, 0, 1)
    assert answer["status"] == "failed"
    (row,) = submissions.fold_rows(ctx.engine, sub_id)
    assert row["status"] == "failed" and row["scores"] is None
    # The estimator's own message, as scikit-learn words it.
    assert row["error"].startswith("ValueError: solver='svd' does not support positive fitting")
    assert row["baseline_scores"]["rmse"] > 0  # the baseline is still scored on the fold


def test_first_fold_marks_running_and_retry_keeps_first_result(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge"))
    assert submissions.get(ctx.engine, sub_id)["state"] == "queued"  # type: ignore[index]
    assert jobs.run_fold(sub_id, 0, 0)["stored"] is True
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None and sub["state"] == "running" and sub["started_at"] is not None
    assert jobs.run_fold(sub_id, 0, 0)["stored"] is False  # a retried job finds its fold recorded
    assert len(submissions.fold_rows(ctx.engine, sub_id)) == 1


def test_canceled_submission_is_not_worked_on(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge"))
    assert submissions.transition(ctx.engine, sub_id, "canceled", LIVE_STATES)
    assert jobs.run_fold(sub_id, 0, 0)["skipped"] == "canceled"
    assert submissions.fold_rows(ctx.engine, sub_id) == []


def test_repeats_use_their_own_seeds(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", folds=3, seed=20)
    sub_id = add_submission(ctx, dataset, config_document(dataset, "Ridge", repeats=2, metrics=["mse"]))
    rows = run_all_folds(sub_id, 3, repeats=2)
    X, y = dev.drop(columns="target").to_numpy(), dev["target"].to_numpy()
    for r in range(2):
        # Repeat r uses seed + r (the vault's contract); reference: KFold(3, shuffle=True, random_state=20 + r).
        cv = list(KFold(3, shuffle=True, random_state=20 + r).split(X))
        reference = cross_validate(Ridge(random_state=0), X, y, cv=cv, scoring="neg_mean_squared_error")
        got = [row["scores"]["mse"] for row in rows if row["repeat"] == r]
        np.testing.assert_allclose(got, -reference["test_score"], rtol=1e-10)
