"""Fold jobs with LightGBM, XGBoost and native categorical columns: the libraries' own models on the same folds.

Reference in every test: the library's scikit-learn class, constructed by hand with the service's
forced values (one thread, quiet, seed 0), fitted on the same training rows of the same folds; its
predictions scored with scikit-learn's metric functions. LightGBM and XGBoost on one thread with a
fixed seed are deterministic, so the scores are equal, not close.
"""

from __future__ import annotations

from typing import Any

import lightgbm
import numpy as np
import pandas as pd
import pytest
import xgboost
from sklearn.datasets import load_breast_cancer, load_diabetes, load_wine
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.metrics import accuracy_score, log_loss, mean_absolute_error, root_mean_squared_error
from sklearn.model_selection import GridSearchCV, KFold, cross_validate
from sklearn.pipeline import Pipeline

from service.records import submissions
from service.submission.resolved import ResolvedModel
from service.vault.folds import FoldPlan, fold_splits, split_keys_from_frame
from tests.support.folds import diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.learning.pipeline import build_pipeline, output_feature_names

LGBM_FORCED: dict[str, Any] = {"n_jobs": 1, "verbose": -1, "random_state": 0}
XGB_FORCED: dict[str, Any] = {"n_jobs": 1, "verbosity": 0, "device": "cpu", "random_state": 0}


def _diabetes_folds(ctx: WorkerContext, estimator: str, params: dict[str, Any]) -> tuple[list[dict[str, Any]], Any]:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=4, seed=7)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, estimator, params=params, features=features, metrics=["rmse", "mae"])
    rows = run_all_folds(add_submission(ctx, dataset, config), 4)
    # The vault's "kfold" plan is KFold(k, shuffle=True, random_state=seed).
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    return rows, (X, y, list(KFold(4, shuffle=True, random_state=7).split(X)))


@pytest.mark.parametrize(("estimator", "reference", "params"), [
    ("LGBMRegressor", lambda p: lightgbm.LGBMRegressor(**p, **LGBM_FORCED),
     {"n_estimators": 60, "num_leaves": 15, "learning_rate": 0.05, "subsample": 0.8, "subsample_freq": 1}),
    ("XGBRegressor", lambda p: xgboost.XGBRegressor(**p, **XGB_FORCED),
     {"n_estimators": 60, "max_depth": 3, "learning_rate": 0.1, "subsample": 0.8}),
], ids=["lightgbm", "xgboost"])
def test_boosted_regressor_scores_equal_the_librarys_own(
    ctx: WorkerContext, estimator: str, reference: Any, params: dict[str, Any]
) -> None:
    # Diabetes (Efron et al. 2004, bundled with scikit-learn); row subsampling exercises the fixed seed.
    rows, (X, y, cv) = _diabetes_folds(ctx, estimator, params)
    for k, (train, test) in enumerate(cv):
        assert rows[k]["status"] == "ok", rows[k]["error"]
        predicted = reference(params).fit(X[train], y[train]).predict(X[test])
        assert rows[k]["scores"]["rmse"] == root_mean_squared_error(y[test], predicted)
        assert rows[k]["scores"]["mae"] == mean_absolute_error(y[test], predicted)


def _classification(ctx: WorkerContext, frame: pd.DataFrame, estimator: str, params: dict[str, Any]
                    ) -> tuple[list[dict[str, Any]], pd.DataFrame, list[str], list[tuple[np.ndarray, np.ndarray]]]:
    dev, hold = frame.iloc[:-30], frame.iloc[-30:]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=3, seed=4)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, estimator, params=params, features=features,
                             metrics=["accuracy", "log_loss"])
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    plan = FoldPlan("stratified", 3, 4)
    splits = fold_splits(plan, split_keys_from_frame(dev.reset_index(drop=True), plan, "target", None, None))
    return rows, dev.reset_index(drop=True), features, [(s.train, s.test) for s in splits]


def test_lightgbm_classifier_on_sorted_breast_cancer(ctx: WorkerContext) -> None:
    # Breast cancer (Wisconsin diagnostic, bundled with scikit-learn), sorted by class so row order
    # carries the label: the stratified folds must not care.
    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    frame = frame.sample(frac=1.0, random_state=0).sort_values("target", kind="stable")
    frame = pd.concat([frame.iloc[:-30], frame.iloc[::-1].iloc[:30]])  # both classes in the holdout too
    params = {"n_estimators": 40, "num_leaves": 7, "colsample_bytree": 0.7}
    rows, dev, features, cv = _classification(ctx, frame, "LGBMClassifier", params)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    for k, (train, test) in enumerate(cv):
        assert rows[k]["status"] == "ok", rows[k]["error"]
        model = lightgbm.LGBMClassifier(**params, **LGBM_FORCED).fit(X[train], y[train])
        assert rows[k]["scores"]["accuracy"] == accuracy_score(y[test], model.predict(X[test]))
        assert rows[k]["scores"]["log_loss"] == log_loss(y[test], model.predict_proba(X[test]), labels=[0, 1])


def test_xgboost_classifier_takes_the_datasets_own_labels(ctx: WorkerContext) -> None:
    # Wine (UCI, bundled with scikit-learn), three classes named by words: xgboost.XGBClassifier
    # itself accepts only 0..K-1, so the reference fits on LabelEncoder's codes (sorted labels).
    frame = load_wine(as_frame=True).frame
    names = np.array(["barolo", "grignolino", "barbera"])  # codes 0, 1, 2 -> sorted: barbera, barolo, grignolino
    frame["target"] = names[frame["target"].to_numpy()]
    frame = frame.sample(frac=1.0, random_state=1)
    params = {"n_estimators": 30, "max_depth": 3, "learning_rate": 0.2}
    rows, dev, features, cv = _classification(ctx, frame, "XGBClassifier", params)
    X, labels = dev[features].to_numpy(), dev["target"].to_numpy()
    classes, codes = np.unique(labels, return_inverse=True)
    for k, (train, test) in enumerate(cv):
        assert rows[k]["status"] == "ok", rows[k]["error"]
        model = xgboost.XGBClassifier(**params, **XGB_FORCED).fit(X[train], codes[train])
        assert rows[k]["scores"]["accuracy"] == accuracy_score(labels[test], classes[model.predict(X[test])])
        assert rows[k]["scores"]["log_loss"] == log_loss(labels[test], model.predict_proba(X[test]), labels=classes)


def _with_categories(part: pd.DataFrame) -> pd.DataFrame:
    """Diabetes with two categorical columns made from its own: sex as words, age in four bands."""
    part = part.copy()
    part["sex"] = pd.Series(np.where(part["sex"] > 0, "f", "m"), index=part.index, dtype="str")
    part["age_band"] = pd.Series(np.select([part["age"] < -0.04, part["age"] < 0.0, part["age"] < 0.04],
                                           ["b1", "b2", "b3"], "b4"), index=part.index, dtype="str")
    return part


@pytest.mark.parametrize(("estimator", "params", "reference"), [
    ("LGBMRegressor", {"n_estimators": 40, "num_leaves": 7, "min_child_samples": 5},
     lambda p, cats: lightgbm.LGBMRegressor(**p, **LGBM_FORCED)),
    ("XGBRegressor", {"n_estimators": 40, "max_depth": 3},
     lambda p, cats: xgboost.XGBRegressor(**p, **XGB_FORCED, enable_categorical=True)),
    ("HistGradientBoostingRegressor", {"max_iter": 40},
     lambda p, cats: HistGradientBoostingRegressor(**p, random_state=0, categorical_features=cats)),
], ids=["lightgbm", "xgboost", "hist-gradient-boosting"])
def test_declared_categorical_columns_go_to_the_estimator_as_categories(
    ctx: WorkerContext, estimator: str, params: dict[str, Any], reference: Any
) -> None:
    dev, hold = (_with_categories(p) for p in diabetes_parts())
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=3, seed=2)
    cats, numeric = ["sex", "age_band"], ["bmi", "bp", "s1", "s5"]
    config = config_document(dataset, estimator, params=params, features=[*numeric, *cats], metrics=["rmse"])
    config["model"]["categorical_features"] = cats  # declared by name; no encoder step
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    # The estimator sees the declared columns first, as pandas categoricals whose categories are the
    # codes of the sorted training values; then the other features in their order.
    frame = dev.reset_index(drop=True)
    y = frame["target"].to_numpy()
    for k, (train, test) in enumerate(KFold(3, shuffle=True, random_state=2).split(frame)):
        assert rows[k]["status"] == "ok", rows[k]["error"]

        def encode(part: pd.DataFrame, train_rows: pd.DataFrame = frame.iloc[train]) -> pd.DataFrame:
            coded = {c: pd.Categorical(part[c], categories=sorted(train_rows[c].unique())).codes for c in cats}
            out = pd.DataFrame({c: pd.Categorical.from_codes(coded[c], categories=list(
                range(train_rows[c].nunique()))) for c in cats}, index=part.index)
            return pd.concat([out, part[numeric]], axis=1)

        model = reference(params, cats).fit(encode(frame.iloc[train]), y[train])
        predicted = model.predict(encode(frame.iloc[test]))
        assert rows[k]["scores"]["rmse"] == root_mean_squared_error(y[test], predicted)


def test_each_library_is_told_which_columns_are_categories() -> None:
    # What each library records of its categorical inputs after a fit: LightGBM the categories of its
    # pandas categoricals, XGBoost its feature types ('c' categorical), HistGradientBoosting is_categorical_.
    frame = _with_categories(load_diabetes(as_frame=True).frame)
    features, cats = ["bmi", "sex", "age_band", "bp"], ("sex", "age_band")
    kinds = {"bmi": "numeric", "bp": "numeric", "sex": "categorical", "age_band": "categorical"}
    fitted = {}
    for estimator, params in [("LGBMRegressor", {"n_estimators": 5}), ("XGBRegressor", {"n_estimators": 5}),
                              ("HistGradientBoostingRegressor", {"max_iter": 5})]:
        pipeline = build_pipeline(ResolvedModel(estimator, params, tuple(features), (), cats), kinds)
        fitted[estimator] = pipeline.fit(frame[features], frame["target"]).named_steps["model"]
        assert output_feature_names(pipeline, features) == ["sex", "age_band", "bmi", "bp"]
    assert fitted["LGBMRegressor"].booster_.dump_model()["pandas_categorical"] == [[0, 1], [0, 1, 2, 3]]
    assert fitted["XGBRegressor"].get_booster().feature_types == ["c", "c", "float", "float"]
    assert fitted["HistGradientBoostingRegressor"].is_categorical_.tolist() == [True, True, False, False]


def test_holdout_refit_with_declared_categories_equals_lightgbm(ctx: WorkerContext) -> None:
    # The holdout job refits on every development row and scores the sealed rows once; reference:
    # LightGBM fitted by hand on the 400 development rows (categories coded from them), scored on the 42 others.
    dev, hold = (_with_categories(p) for p in diabetes_parts())
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=3, seed=2)
    cats, numeric = ["sex", "age_band"], ["bmi", "bp", "s5"]
    params = {"n_estimators": 30, "num_leaves": 7}
    config = config_document(dataset, "LGBMRegressor", params=params, features=[*cats, *numeric], metrics=["rmse"])
    config["model"]["categorical_features"] = cats
    sub_id = add_submission(ctx, dataset, config)
    run_all_folds(sub_id, 3)
    jobs.summarize(sub_id)
    assert jobs.score_holdout(sub_id)["holdout"] == "scored"
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None

    def encode(part: pd.DataFrame) -> pd.DataFrame:
        coded = {c: pd.Categorical.from_codes(pd.Categorical(part[c], categories=sorted(dev[c].unique())).codes,
                                              categories=list(range(dev[c].nunique()))) for c in cats}
        return pd.concat([pd.DataFrame(coded, index=part.index), part[numeric]], axis=1)

    model = lightgbm.LGBMRegressor(**params, **LGBM_FORCED).fit(encode(dev), dev["target"].to_numpy())
    expected = root_mean_squared_error(hold["target"].to_numpy(), model.predict(encode(hold)))
    assert stored["scores"]["rmse"] == expected


def test_nested_search_over_lightgbm_parameters(ctx: WorkerContext) -> None:
    # Reference: cross_validate(GridSearchCV(LGBMRegressor)) on the same outer folds; the inner search
    # scores by the first metric on KFold(3, shuffle=True, random_state=<fold plan seed>).
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=3, seed=5)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, "LGBMRegressor", params={"n_estimators": 30}, features=features,
                             metrics=["rmse"])
    config["search"] = {"grid": {"num_leaves": [4, 15], "learning_rate": [0.05, 0.2]}, "distributions": None,
                        "n_iter": None, "inner_folds": 3}
    assert jobs.check_config(config, dataset["id"])["ok"]
    rows = run_all_folds(add_submission(ctx, dataset, config), 3)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    search = GridSearchCV(Pipeline([("model", lightgbm.LGBMRegressor(n_estimators=30, **LGBM_FORCED))]),
                          {"model__num_leaves": [4, 15], "model__learning_rate": [0.05, 0.2]},
                          scoring="neg_root_mean_squared_error", cv=KFold(3, shuffle=True, random_state=5))
    reference = cross_validate(search, X, y, cv=list(KFold(3, shuffle=True, random_state=5).split(X)),
                               scoring={"rmse": "neg_root_mean_squared_error"}, return_estimator=True)
    for k, row in enumerate(rows):
        assert row["status"] == "ok", row["error"]
        assert row["scores"]["rmse"] == -reference["test_rmse"][k]
        best = reference["estimator"][k].best_params_
        assert row["search"]["best_params"] == {"num_leaves": best["model__num_leaves"],
                                                "learning_rate": best["model__learning_rate"]}
