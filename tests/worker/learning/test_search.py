"""Nested search: outer scores equal cross_validate(GridSearchCV(...)); the naive inner best is optimistic."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.model_selection import (
    GridSearchCV,
    KFold,
    RandomizedSearchCV,
    StratifiedKFold,
    cross_validate,
)
from sklearn.pipeline import Pipeline

from service.records import submissions
from service.vault.folds import FoldPlan, fold_splits, split_keys_from_frame
from tests.support.class_sets import padded, sorted_by_class
from tests.support.folds import diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.learning.search import MetricScorer

ALPHAS = [0.01, 0.1, 1.0, 10.0, 100.0]


def searched(config: dict[str, Any], **search: Any) -> dict[str, Any]:
    config["search"] = {"grid": None, "distributions": None, "n_iter": None, "inner_folds": 3, **search}
    return config


def test_outer_scores_equal_cross_validate_of_grid_search(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=4, seed=8)
    features = [c for c in dev.columns if c != "target"]
    config = searched(config_document(dataset, "Ridge", features=features, metrics=["rmse", "r2"]),
                      grid={"alpha": ALPHAS})
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 4)

    # Reference: cross_validate(GridSearchCV(...), cv=outer) on the same outer folds (KFold(4, shuffle, 8));
    # the search scores by the first metric (rmse -> neg_root_mean_squared_error) on KFold(3, shuffle=True,
    # random_state=<fold plan seed>), with the estimator as the pipeline's "model" step.
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    outer = list(KFold(4, shuffle=True, random_state=8).split(X))
    search = GridSearchCV(Pipeline([("model", Ridge(random_state=0))]), {"model__alpha": ALPHAS},
                          scoring="neg_root_mean_squared_error", cv=KFold(3, shuffle=True, random_state=8))
    reference = cross_validate(search, X, y, cv=outer, scoring={"rmse": "neg_root_mean_squared_error", "r2": "r2"},
                               return_estimator=True, return_train_score=True)
    for k, row in enumerate(rows):
        assert row["status"] == "ok", row["error"]
        assert row["scores"]["rmse"] == pytest.approx(-reference["test_rmse"][k], rel=1e-10)
        assert row["scores"]["r2"] == pytest.approx(reference["test_r2"][k], rel=1e-10)
        assert row["train_scores"]["rmse"] == pytest.approx(-reference["train_rmse"][k], rel=1e-10)
        fitted = reference["estimator"][k]
        assert row["search"]["best_params"] == {"alpha": fitted.best_params_["model__alpha"]}
        assert row["search"]["best_inner_score"] == pytest.approx(-fitted.best_score_, rel=1e-10)
        assert row["search"]["scoring"] == "rmse"

    jobs.summarize(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    summary = sub["cv_summary"]["search"]
    chosen = [e.best_params_["model__alpha"] for e in reference["estimator"]]
    assert sum(c["folds"] for c in summary["chosen"]["alpha"]) == 4
    assert {c["value"]: c["folds"] for c in summary["chosen"]["alpha"]} == \
        {repr(a): chosen.count(a) for a in set(chosen)}
    assert summary["nested_mean"] == pytest.approx(-reference["test_rmse"].mean(), rel=1e-10)
    assert summary["naive_best_inner_mean"] == pytest.approx(
        np.mean([-e.best_score_ for e in reference["estimator"]]), rel=1e-10)


def test_randomized_search_on_stratified_classification(ctx: WorkerContext) -> None:
    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    dev, hold = frame.iloc[:480], frame.iloc[480:]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=3, seed=5)
    features = ["mean_radius", "mean_texture", "worst_area", "worst_smoothness", "mean_concavity"]
    config = searched(config_document(dataset, "LogisticRegression", params={"max_iter": 5000},
                                      features=features, metrics=["log_loss", "accuracy"],
                                      preprocess=[{"transformer": "StandardScaler", "columns": features}]),
                      distributions={"C": {"log_uniform": [0.001, 100.0]}}, n_iter=4)
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 3)

    # Reference: RandomizedSearchCV(n_iter=4, random_state=<seed>) of C ~ loguniform(0.001, 100) scored by
    # neg_log_loss on StratifiedKFold(3, shuffle=True, random_state=<seed>), cross-validated on the vault's splits.
    from sklearn.compose import ColumnTransformer
    from sklearn.preprocessing import StandardScaler

    plan = FoldPlan("stratified", 3, 5)
    outer = [(s.train, s.test) for s in fold_splits(plan, split_keys_from_frame(dev, plan, "target", None, None))]
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    pipeline = Pipeline([("preprocess", ColumnTransformer([("sc", StandardScaler(), list(range(5)))],
                                                          remainder="passthrough")),
                         ("model", LogisticRegression(max_iter=5000))])
    search = RandomizedSearchCV(pipeline, {"model__C": stats.loguniform(0.001, 100.0)}, n_iter=4,
                                scoring="neg_log_loss", cv=StratifiedKFold(3, shuffle=True, random_state=5),
                                random_state=5)
    reference = cross_validate(search, X, y, cv=outer, scoring="neg_log_loss", return_estimator=True)
    for k, row in enumerate(rows):
        assert row["status"] == "ok", row["error"]
        assert row["scores"]["log_loss"] == pytest.approx(-reference["test_score"][k], rel=1e-8)
        assert row["search"]["best_params"]["C"] == pytest.approx(reference["estimator"][k].best_params_["model__C"])


def test_naive_best_inner_score_is_more_optimistic_than_nested(ctx: WorkerContext) -> None:
    # Selection bias (Varma & Simon 2006, BMC Bioinformatics 7:91; Cawley & Talbot 2010, JMLR 11:2079-2107):
    # the best of several inner scores is biased upwards, the outer score of the chosen model is not. Data:
    # diabetes (bundled with scikit-learn), its first 80 rows as development rows (the next 20 sealed), plus
    # 100 pure-noise features; KNN over 7 neighbourhood sizes, r2, seeds 0-7 taken as they come. Measured
    # with scikit-learn alone on 40 seeds of this design: mean gap 0.07 (sd 0.13), every block of 8 seeds > 0.
    frame = load_diabetes(as_frame=True).frame.iloc[:100].reset_index(drop=True)
    gaps = []
    for seed in range(8):
        rng = np.random.default_rng(seed)
        noise = pd.DataFrame(rng.normal(size=(100, 100)), columns=[f"n{i}" for i in range(100)])
        noisy = pd.concat([frame, noise], axis=1)
        dev, hold = noisy.iloc[:80], noisy.iloc[80:]
        dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=100 + seed)
        features = [c for c in dev.columns if c != "target"]
        config = searched(config_document(dataset, "KNeighborsRegressor", features=features, metrics=["r2"]),
                          grid={"n_neighbors": [1, 2, 3, 5, 8, 13, 20]})
        sub_id = add_submission(ctx, dataset, config)
        run_all_folds(sub_id, 5)
        jobs.summarize(sub_id)
        sub = submissions.get(ctx.engine, sub_id)
        assert sub is not None
        summary = sub["cv_summary"]["search"]
        gaps.append(summary["naive_best_inner_mean"] - summary["nested_mean"])  # r2: greater is better
    assert np.mean(gaps) > 0, gaps


def test_holdout_refits_the_search_on_every_development_row(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=4, seed=8)
    features = [c for c in dev.columns if c != "target"]
    config = searched(config_document(dataset, "Ridge", features=features, metrics=["rmse"]),
                      grid={"alpha": ALPHAS})
    sub_id = add_submission(ctx, dataset, config)
    run_all_folds(sub_id, 4)
    jobs.summarize(sub_id)
    assert jobs.score_holdout(sub_id)["holdout"] == "scored"
    stored = submissions.get_holdout(ctx.engine, sub_id)
    assert stored is not None
    # Reference: GridSearchCV refitted on all 400 development rows with the same inner folds, scored on the
    # 42 sealed rows with scikit-learn's root_mean_squared_error.
    from sklearn.metrics import root_mean_squared_error

    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    reference = GridSearchCV(Pipeline([("model", Ridge(random_state=0))]), {"model__alpha": ALPHAS},
                             scoring="neg_root_mean_squared_error",
                             cv=KFold(3, shuffle=True, random_state=8)).fit(X, y)
    expected = root_mean_squared_error(hold["target"].to_numpy(), reference.predict(hold[features].to_numpy()))
    assert stored["scores"]["rmse"] == pytest.approx(expected, rel=1e-10)


def check_search(dataset: dict[str, Any], estimator: str, search: dict[str, Any], **kwargs: Any) -> dict[str, Any]:
    return jobs.check_config(searched(config_document(dataset, estimator, **kwargs), **search), dataset["id"])


def test_check_config_validates_searched_values_in_sklearns_words(ctx: WorkerContext) -> None:
    frame = load_diabetes(as_frame=True).frame
    dataset = add_dataset(ctx, frame.iloc[:400], frame.iloc[400:], "target", "regression")
    assert check_search(dataset, "Ridge", {"grid": {"alpha": ALPHAS}})["ok"] is True
    answer = check_search(dataset, "Ridge", {"grid": {"alpha": [1.0, -1.0], "solver": ["auto", "nope"]}})
    found = {p["pointer"]: p["detail"] for p in answer["problems"]}
    assert answer["ok"] is False and set(found) == {"/search/grid/alpha/1", "/search/grid/solver/1"}
    # scikit-learn's own wording (InvalidParameterError) for a negative alpha and an unknown solver.
    assert "'alpha' parameter of Ridge must be" in found["/search/grid/alpha/1"]
    assert "'solver' parameter of Ridge must be" in found["/search/grid/solver/1"]
    capped = check_search(dataset, "Lasso", {"grid": {"max_iter": [1000, 10_001]}})
    assert [p["pointer"] for p in capped["problems"]] == ["/search/grid/max_iter/1"]
    assert "service cap" in capped["problems"][0]["detail"]
    ranged = check_search(dataset, "Ridge", {"distributions": {"alpha": {"log_uniform": [-1.0, 10.0]}}, "n_iter": 3})
    assert [p["pointer"] for p in ranged["problems"]] == ["/search/distributions/alpha"]
    unknown = check_search(dataset, "Ridge", {"grid": {"gamma": [1, 2]}})
    assert [p["pointer"] for p in unknown["problems"]] == ["/search/grid/gamma/0", "/search/grid/gamma/1"]


def test_the_search_scorer_counts_every_class_of_the_dataset() -> None:
    # An inner fold's model that saw two of iris's three classes (bundled with scikit-learn), scored by
    # the search's scorer on rows of all three. Reference: sklearn.metrics.roc_auc_score with labels=
    # the three classes on the model's probabilities padded by hand with a zero column for the unseen one.
    X, y = sorted_by_class("iris")
    seen = y != 1
    model = LogisticRegression(max_iter=5000).fit(X[seen], y[seen])
    classes = np.unique(y)
    expected = skm.roc_auc_score(y, padded(model.predict_proba(X), model.classes_, classes), labels=classes,
                                 multi_class="ovr")
    assert MetricScorer("roc_auc", classes)(model, X, y) == pytest.approx(expected, rel=1e-12)
    assert MetricScorer("log_loss", classes)(model, X, y) == pytest.approx(
        -skm.log_loss(y, padded(model.predict_proba(X), model.classes_, classes), labels=classes), rel=1e-12)
