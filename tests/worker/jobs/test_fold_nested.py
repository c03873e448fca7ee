"""Fold jobs with nested estimators: calibration, voting, stacking and a transformed target.

Reference in every test: the same scikit-learn meta-estimator built by hand around the same members
(with the service's seed 0 and one job), scored by cross_validate on the same folds.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from sklearn.base import BaseEstimator
from sklearn.calibration import CalibratedClassifierCV
from sklearn.compose import TransformedTargetRegressor
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.ensemble import StackingRegressor, VotingClassifier, VotingRegressor
from sklearn.linear_model import Ridge
from sklearn.model_selection import KFold, StratifiedKFold, cross_validate
from sklearn.naive_bayes import GaussianNB
from sklearn.neighbors import KNeighborsClassifier, KNeighborsRegressor
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor

from tests.support.folds import diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext

NUMERIC = ["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"]


def _scores(rows: list[dict[str, Any]], reference: dict[str, Any], metrics: dict[str, int]) -> None:
    for k, row in enumerate(sorted(rows, key=lambda r: r["fold"])):
        assert row["status"] == "ok", row["error"]
        for name, sign in metrics.items():
            assert row["scores"][name] == pytest.approx(sign * reference[f"test_{name}"][k], rel=1e-12), (k, name)


@pytest.mark.parametrize(("params", "reference"), [
    ({"estimators": [{"name": "ridge", "estimator": "Ridge", "params": {"alpha": 2.0}},
                     {"name": "knn", "estimator": "KNeighborsRegressor", "params": {"n_neighbors": 15}}],
      "final_estimator": {"estimator": "Ridge"}},
     StackingRegressor([("ridge", Ridge(alpha=2.0, random_state=0)), ("knn", KNeighborsRegressor(n_neighbors=15))],
                       final_estimator=Ridge(random_state=0), n_jobs=1)),
    ({"estimators": [{"name": "ridge", "estimator": "Ridge"},
                     {"name": "tree", "estimator": "DecisionTreeRegressor", "params": {"max_depth": 4}}],
      "weights": [2, 1]},
     VotingRegressor([("ridge", Ridge(random_state=0)), ("tree", DecisionTreeRegressor(max_depth=4, random_state=0))],
                     weights=[2, 1], n_jobs=1)),
    ({"regressor": {"estimator": "Ridge", "params": {"alpha": 0.1}}, "func": "log1p"},
     TransformedTargetRegressor(Ridge(alpha=0.1, random_state=0), func=np.log1p, inverse_func=np.expm1)),
    ({"regressor": {"estimator": "Ridge"}, "func": "sqrt", "inverse_func": "square"},
     TransformedTargetRegressor(Ridge(random_state=0), func=np.sqrt, inverse_func=np.square)),
], ids=["stacking", "voting", "log1p-target", "sqrt-target"])
def test_nested_regressors_on_diabetes(ctx: WorkerContext, params: dict[str, Any], reference: BaseEstimator) -> None:
    # Diabetes (Efron et al. 2004, bundled with scikit-learn); the vault's kfold plan is
    # KFold(k, shuffle=True, random_state=seed).
    estimator = type(reference).__name__
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=3, seed=6)
    config = config_document(dataset, estimator, params=params, features=NUMERIC, metrics=["rmse", "r2"])
    assert jobs.check_config(config, dataset["id"])["ok"]
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    X, y = dev[NUMERIC].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(3, shuffle=True, random_state=6).split(X))
    expected = cross_validate(reference, X, y, cv=cv, scoring={"rmse": "neg_root_mean_squared_error", "r2": "r2"})
    _scores(rows, expected, {"rmse": -1, "r2": 1})


def _classification(ctx: WorkerContext, frame: pd.DataFrame, estimator: str, params: dict[str, Any],
                    reference: BaseEstimator) -> None:
    frame = frame.sample(frac=1.0, random_state=3)
    dev, hold = frame.iloc[:-25], frame.iloc[-25:]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=3, seed=9)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, estimator, params=params, features=features, metrics=["accuracy"])
    answer = jobs.check_config(config, dataset["id"])
    assert answer["ok"] and answer["has_proba"], answer
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    # The vault's stratified plan is StratifiedKFold(k, shuffle=True, random_state=seed).
    cv = list(StratifiedKFold(3, shuffle=True, random_state=9).split(X, y))
    _scores(rows, cross_validate(reference, X, y, cv=cv, scoring={"accuracy": "accuracy"}), {"accuracy": 1})


def test_calibrated_gaussian_nb_on_breast_cancer(ctx: WorkerContext) -> None:
    # scikit-learn's calibration example pairs GaussianNB (over-confident) with isotonic calibration.
    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    _classification(ctx, frame, "CalibratedClassifierCV",
                    {"estimator": {"estimator": "GaussianNB"}, "method": "isotonic", "cv": 3},
                    CalibratedClassifierCV(GaussianNB(), method="isotonic", cv=3, n_jobs=1))


def test_soft_voting_on_wine(ctx: WorkerContext) -> None:
    # Wine (UCI, bundled with scikit-learn): three classes.
    _classification(ctx, load_wine(as_frame=True).frame, "VotingClassifier", {
        "estimators": [{"name": "nb", "estimator": "GaussianNB"},
                       {"name": "tree", "estimator": "DecisionTreeClassifier", "params": {"max_depth": 3}},
                       {"name": "knn", "estimator": "KNeighborsClassifier", "params": {"n_neighbors": 7}}],
        "voting": "soft"},
        VotingClassifier([("nb", GaussianNB()), ("tree", DecisionTreeClassifier(max_depth=3, random_state=0)),
                          ("knn", KNeighborsClassifier(n_neighbors=7, n_jobs=1))], voting="soft", n_jobs=1))


def test_member_parameters_are_checked_at_their_pointers(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression")
    config = config_document(dataset, "StackingRegressor", features=NUMERIC, params={
        "estimators": [{"name": "ridge", "estimator": "Ridge", "params": {"alpha": -1.0}},
                       {"name": "forest", "estimator": "RandomForestRegressor", "params": {"n_estimators": 900}}],
        "final_estimator": {"estimator": "Ridge", "params": {"solver": "magic"}}, "cv": 50})
    answer = jobs.check_config(config, dataset["id"])
    found = {p["pointer"]: p["detail"] for p in answer["problems"]}
    assert set(found) == {"/model/params/estimators/0/params/alpha", "/model/params/estimators/1/params/n_estimators",
                          "/model/params/final_estimator/params/solver", "/model/params/cv"}
    assert "'alpha' parameter of Ridge" in found["/model/params/estimators/0/params/alpha"]
    assert "at most 500" in found["/model/params/estimators/1/params/n_estimators"]
    # A log1p target needs y > -1: diabetes shifted below that is refused at func.
    shifted = add_dataset(ctx, dev.assign(target=dev["target"] - 100), hold, "target", "regression")
    answer = jobs.check_config(config_document(shifted, "TransformedTargetRegressor", features=NUMERIC, params={
        "regressor": {"estimator": "Ridge"}, "func": "log1p"}), shifted["id"])
    assert answer["problems"][0]["pointer"] == "/model/params/func"
    assert "greater than -1" in answer["problems"][0]["detail"]
