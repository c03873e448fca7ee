"""Fold jobs with the count, amount and quantile regressors, GaussianNB and the imputing/expanding transformers.

Reference in every test: scikit-learn's cross_validate of the same pipeline built by hand (a
ColumnTransformer with the remainder passed through, as the service builds it) on the same folds:
the vault's "kfold" plan is KFold(k, shuffle=True, random_state=seed).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from sklearn.base import BaseEstimator
from sklearn.compose import ColumnTransformer
from sklearn.datasets import load_breast_cancer
from sklearn.decomposition import PCA
from sklearn.experimental import enable_iterative_imputer  # noqa: F401
from sklearn.impute import IterativeImputer, KNNImputer, MissingIndicator, SimpleImputer
from sklearn.linear_model import (
    GammaRegressor,
    HuberRegressor,
    PoissonRegressor,
    QuantileRegressor,
    Ridge,
    TweedieRegressor,
)
from sklearn.metrics import accuracy_score, log_loss
from sklearn.model_selection import KFold, StratifiedKFold, cross_validate
from sklearn.naive_bayes import GaussianNB
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import KBinsDiscretizer, SplineTransformer, StandardScaler, TargetEncoder

from tests.support.folds import diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext

NUMERIC = ["age", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"]
SCORING = {"rmse": "neg_root_mean_squared_error", "r2": "r2"}


def _run(ctx: WorkerContext, dev: pd.DataFrame, hold: pd.DataFrame, estimator: str, params: dict[str, Any],
         features: list[str], preprocess: list[dict[str, Any]]) -> list[dict[str, Any]]:
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=3, seed=8)
    config = config_document(dataset, estimator, params=params, features=features, metrics=list(SCORING),
                             preprocess=preprocess)
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    assert [r["status"] for r in rows] == ["ok"] * 3, [r["error"] for r in rows]
    return rows


def row_of(rows: list[dict[str, Any]], fold: int) -> dict[str, Any]:
    (row,) = [r for r in rows if r["fold"] == fold]
    return row


def _assert_same_scores(rows: list[dict[str, Any]], reference: BaseEstimator, X: Any, y: np.ndarray) -> None:
    cv = list(KFold(3, shuffle=True, random_state=8).split(X))
    expected = cross_validate(reference, X, y, cv=cv, scoring=SCORING)
    for k, row in enumerate(rows):
        assert row["scores"]["rmse"] == pytest.approx(-expected["test_rmse"][k], rel=1e-12), k
        assert row["scores"]["r2"] == pytest.approx(expected["test_r2"][k], rel=1e-12), k


@pytest.mark.parametrize(("estimator", "params", "reference"), [
    ("PoissonRegressor", {"alpha": 0.01, "max_iter": 1000}, PoissonRegressor(alpha=0.01, max_iter=1000)),
    ("GammaRegressor", {"alpha": 0.01, "max_iter": 1000}, GammaRegressor(alpha=0.01, max_iter=1000)),
    ("TweedieRegressor", {"power": 1.5, "link": "log", "alpha": 0.01, "max_iter": 1000},
     TweedieRegressor(power=1.5, link="log", alpha=0.01, max_iter=1000)),
    ("HuberRegressor", {"epsilon": 1.5, "max_iter": 1000}, HuberRegressor(epsilon=1.5, max_iter=1000)),
    ("QuantileRegressor", {"quantile": 0.8, "alpha": 0.01, "solver": "highs"},
     QuantileRegressor(quantile=0.8, alpha=0.01, solver="highs")),
])
def test_count_amount_and_quantile_regressors(
    ctx: WorkerContext, estimator: str, params: dict[str, Any], reference: BaseEstimator
) -> None:
    # Diabetes (Efron et al. 2004, bundled with scikit-learn): a positive target (25..346), so every
    # loss's domain holds; features scaled in the pipeline, as the GLMs' convergence wants.
    dev, hold = diabetes_parts()
    rows = _run(ctx, dev, hold, estimator, params, NUMERIC,
                [{"transformer": "StandardScaler", "columns": NUMERIC}])
    _assert_same_scores(rows, make_pipeline(StandardScaler(), reference), dev[NUMERIC].to_numpy(),
                        dev["target"].to_numpy())
    assert rows[0]["coefficients"]["names"] == NUMERIC  # linear models: coefficients recorded per fold


def test_gaussian_nb_on_sorted_breast_cancer(ctx: WorkerContext) -> None:
    # Breast cancer (bundled with scikit-learn), sorted by class: stratified folds, GaussianNB's defaults.
    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    frame = frame.sort_values("target", kind="stable")
    dev, hold = frame.iloc[15:-15], pd.concat([frame.iloc[:15], frame.iloc[-15:]])
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=4, seed=2)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, "GaussianNB", features=features, metrics=["accuracy", "log_loss"])
    rows = run_all_folds(add_submission(ctx, dataset, config), 4)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    # The vault's stratified plan is StratifiedKFold(k, shuffle=True, random_state=seed) on the target.
    cv = list(StratifiedKFold(4, shuffle=True, random_state=2).split(X, y))
    for k, (train, test) in enumerate(cv):
        model = GaussianNB().fit(X[train], y[train])
        assert row_of(rows, k)["scores"]["accuracy"] == accuracy_score(y[test], model.predict(X[test]))
        assert row_of(rows, k)["scores"]["log_loss"] == log_loss(y[test], model.predict_proba(X[test]), labels=[0, 1])


def _with_gaps(part: pd.DataFrame) -> pd.DataFrame:
    """Diabetes with missing values at fixed rows of three columns, and sex as words."""
    part = part.copy()
    rows = np.arange(len(part))
    for column, step in (("bmi", 7), ("bp", 11), ("s5", 13)):
        part.loc[part.index[rows % step == 3], column] = np.nan
    part["sex"] = pd.Series(np.where(part["sex"] > 0, "f", "m"), index=part.index, dtype="str")
    return part


GAPS = ["bmi", "bp", "s5"]
OTHERS = ["age", "s1", "s2", "s3", "s4", "s6"]


@pytest.mark.parametrize(("steps", "reference"), [
    ([{"transformer": "KNNImputer", "columns": GAPS, "params": {"n_neighbors": 7}}],
     [("knn", KNNImputer(n_neighbors=7), GAPS)]),
    ([{"transformer": "IterativeImputer", "columns": GAPS, "params": {"max_iter": 20}}],
     [("it", IterativeImputer(max_iter=20, random_state=0), GAPS)]),
    ([{"transformer": "SimpleImputer", "columns": GAPS, "params": {"strategy": "median", "add_indicator": True}}],
     [("si", SimpleImputer(strategy="median", add_indicator=True), GAPS)]),
    ([{"transformer": "SimpleImputer", "columns": GAPS},
      {"transformer": "SplineTransformer", "columns": GAPS, "params": {"n_knots": 6, "degree": 2}}],
     [("sp", make_pipeline(SimpleImputer(), SplineTransformer(n_knots=6, degree=2)), GAPS)]),
    ([{"transformer": "SimpleImputer", "columns": GAPS},
      {"transformer": "KBinsDiscretizer", "columns": GAPS, "params": {"n_bins": 4, "encode": "onehot-dense"}}],
     [("kb", make_pipeline(SimpleImputer(), KBinsDiscretizer(n_bins=4, encode="onehot-dense")), GAPS)]),
    ([{"transformer": "SimpleImputer", "columns": GAPS},
      {"transformer": "StandardScaler", "columns": GAPS},
      {"transformer": "PCA", "columns": GAPS, "params": {"n_components": 2}}],
     [("pca", make_pipeline(SimpleImputer(), StandardScaler(), PCA(n_components=2, random_state=0)), GAPS)]),
], ids=["knn-imputer", "iterative-imputer", "add-indicator", "spline", "kbins", "pca"])
def test_imputers_and_expansions(ctx: WorkerContext, steps: list[dict[str, Any]], reference: list[Any]) -> None:
    dev, hold = (_with_gaps(p) for p in diabetes_parts())
    # MissingIndicator beside an imputer is the same as add_indicator: shown by the add-indicator case.
    features = [*GAPS, *OTHERS]
    rows = _run(ctx, dev, hold, "Ridge", {}, features, steps)
    pipeline = make_pipeline(ColumnTransformer(reference, remainder="passthrough"), Ridge(random_state=0))
    _assert_same_scores(rows, pipeline, dev[features], dev["target"].to_numpy())


def test_missing_indicator_and_target_encoder(ctx: WorkerContext) -> None:
    dev, hold = (_with_gaps(p) for p in diabetes_parts())
    features = ["sex", *GAPS, *OTHERS]
    # Diabetes' target holds whole numbers, which target_type="auto" reads as classes (type_of_target).
    steps = [{"transformer": "TargetEncoder", "columns": ["sex"], "params": {"target_type": "continuous"}},
             {"transformer": "MissingIndicator", "columns": GAPS, "params": {"features": "all"}}]
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=3, seed=8)
    config = config_document(dataset, "Ridge", features=features, metrics=list(SCORING), preprocess=steps)
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    assert [r["status"] for r in rows] == ["ok"] * 3, [r["error"] for r in rows]
    # The service seeds TargetEncoder's shuffled cross fitting (random_state=0).
    encoder = TargetEncoder(target_type="continuous", random_state=0)
    reference = make_pipeline(ColumnTransformer([("te", encoder, ["sex"]),
                                                 ("mi", MissingIndicator(features="all"), GAPS)],
                                                remainder="passthrough"), Ridge(random_state=0))
    # GAPS are replaced by their indicators; the remainder (OTHERS) passes through.
    _assert_same_scores(rows, reference, dev[features], dev["target"].to_numpy())
    assert rows[0]["coefficients"]["names"] == ["sex", "missingindicator_bmi", "missingindicator_bp",
                                                "missingindicator_s5", *OTHERS]


def test_a_target_outside_the_losss_domain_is_refused(ctx: WorkerContext) -> None:
    # HalfPoissonLoss needs y >= 0 and HalfGammaLoss y > 0 (scikit-learn's _loss module); diabetes
    # shifted down by 100 has negative targets, and a zero target breaks Gamma only.
    dev, hold = diabetes_parts()
    shifted = add_dataset(ctx, dev.assign(target=dev["target"] - 100), hold, "target", "regression")
    answer = jobs.check_config(config_document(shifted, "PoissonRegressor", features=NUMERIC), shifted["id"])
    assert answer["ok"] is False
    ((problem,),) = [answer["problems"]]
    assert problem["pointer"] == "/model/estimator"
    assert "PoissonRegressor needs a non-negative target" in problem["detail"] and "-75" in problem["detail"]
    zeroed = add_dataset(ctx, dev.assign(target=np.where(dev["target"] < 60, 0.0, dev["target"])), hold,
                         "target", "regression")
    assert jobs.check_config(config_document(zeroed, "PoissonRegressor", features=NUMERIC), zeroed["id"])["ok"]
    gamma = jobs.check_config(config_document(zeroed, "GammaRegressor", features=NUMERIC), zeroed["id"])
    assert "strictly positive" in gamma["problems"][0]["detail"]
    tweedie = jobs.check_config(config_document(zeroed, "TweedieRegressor", params={"power": 2.5},
                                                features=NUMERIC), zeroed["id"])
    assert tweedie["problems"][0]["pointer"] == "/model/params/power"
    lgbm = jobs.check_config(config_document(shifted, "LGBMRegressor", params={"objective": "poisson"},
                                             features=NUMERIC), shifted["id"])
    assert lgbm["problems"][0]["pointer"] == "/model/params/objective"
    # With power 0 (the normal distribution) any target fits.
    assert jobs.check_config(config_document(shifted, "TweedieRegressor", params={"power": 0.0},
                                             features=NUMERIC), shifted["id"])["ok"]
