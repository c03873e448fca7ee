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


def _replicated_diabetes(copies: int = 3, rows: int = 150) -> pd.DataFrame:
    """Diabetes (bundled with scikit-learn), each of its first rows measured ``copies`` times (tiny noise):
    a group per original row, as repeated visits of one patient would be."""
    base = load_diabetes(as_frame=True).frame.iloc[:rows].reset_index(drop=True)
    rng = np.random.default_rng(0)
    parts = []
    for _ in range(copies):
        part = base.copy()
        features = [col for col in base.columns if col != "target"]
        part[features] = part[features] + rng.normal(scale=1e-3, size=(rows, len(features)))
        part["patient"] = np.arange(rows)
        parts.append(part)
    mixed = pd.concat(parts, ignore_index=True)
    return mixed.sample(frac=1.0, random_state=1).reset_index(drop=True)


def test_inner_folds_of_a_group_plan_are_scikit_learns_group_k_fold(ctx: WorkerContext) -> None:
    frame = _replicated_diabetes()
    dev, hold = frame.iloc[:400], frame.iloc[400:]
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="group", folds=4, seed=3,
                          group_column="patient")
    features = [c for c in dev.columns if c not in ("target", "patient")]
    neighbours = [1, 3, 10, 30]
    config = searched(config_document(dataset, "KNeighborsRegressor", features=features, metrics=["rmse"]),
                      grid={"n_neighbors": neighbours})
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 4)

    # Reference: GridSearchCV(cv=GroupKFold(3)) fitted with the training rows' groups, on the vault's outer
    # group folds; the same search with plain KFold inner folds picks the neighbour that is a copy of the row.
    from sklearn.model_selection import GroupKFold
    from sklearn.neighbors import KNeighborsRegressor

    plan = FoldPlan("group", 4, 3)
    outer = fold_splits(plan, split_keys_from_frame(dev, plan, "target", "patient", None))
    X, y, groups = dev[features].to_numpy(), dev["target"].to_numpy(), dev["patient"].to_numpy()
    leaky_choices = []
    for split, row in zip(outer, rows, strict=True):
        assert row["status"] == "ok", row["error"]
        assert not set(groups[split.train]) & set(groups[split.test])
        grid = {"model__n_neighbors": neighbours}
        search = GridSearchCV(Pipeline([("model", KNeighborsRegressor())]), grid,
                              scoring="neg_root_mean_squared_error", cv=GroupKFold(3))
        search.fit(X[split.train], y[split.train], groups=groups[split.train])
        assert row["search"]["best_params"] == {"n_neighbors": search.best_params_["model__n_neighbors"]}
        assert row["search"]["best_inner_score"] == pytest.approx(-search.best_score_, rel=1e-10)
        rmse = skm.root_mean_squared_error(y[split.test], search.predict(X[split.test]))
        assert row["scores"]["rmse"] == pytest.approx(rmse, rel=1e-10)
        leaky = GridSearchCV(Pipeline([("model", KNeighborsRegressor())]), grid,
                             scoring="neg_root_mean_squared_error", cv=KFold(3, shuffle=True, random_state=3))
        leaky_choices.append(leaky.fit(X[split.train], y[split.train]).best_params_["model__n_neighbors"])
    assert leaky_choices == [1] * 4  # rows of one patient on both sides: the copy is the best neighbour
    assert all(row["search"]["best_params"]["n_neighbors"] > 1 for row in rows)


def test_inner_folds_of_a_time_plan_chain_forward_and_keep_ties_together() -> None:
    from sklearn.model_selection import TimeSeriesSplit

    from service.vault.folds import SplitKeys
    from worker.learning.search import PlannedInnerFolds, for_rows

    # Distinct times in shuffled file order: exactly TimeSeriesSplit's splits on the time-sorted rows.
    rng = np.random.default_rng(4)
    times = rng.permutation(60).astype(np.int64)
    folds = PlannedInnerFolds("time", 3, SplitKeys(n_rows=60, time=times))
    ours = [(np.sort(times[tr]), np.sort(times[te])) for tr, te in folds.split(np.zeros((60, 1)))]
    ordered = np.sort(times)
    reference = [(ordered[tr], ordered[te]) for tr, te in TimeSeriesSplit(3).split(ordered)]
    assert len(ours) == 3
    for (a, b), (c, d) in zip(ours, reference, strict=True):
        assert np.array_equal(a, c) and np.array_equal(b, d)

    # Tied times (three rows per day), a subset of the rows as a learning-curve point would use them: every
    # inner split trains on earlier days only and no day is on both sides.
    days = np.repeat(np.arange(40), 3)[rng.permutation(120)]
    subset = np.sort(rng.choice(120, size=90, replace=False))
    tied = for_rows(GridSearchCV(Ridge(), {"alpha": [1.0]},
                                 cv=PlannedInnerFolds("time", 4, SplitKeys(n_rows=120, time=days))), subset)
    splits = list(tied.cv.split(np.zeros((90, 1))))
    assert len(splits) == 4
    for train, test in splits:
        assert days[subset][train].max() < days[subset][test].min()
    with pytest.raises(ValueError, match="the inner folds were set for 90 rows, the search got 80"):
        list(tied.cv.split(np.zeros((80, 1))))


def test_a_search_on_a_time_plan_tunes_on_the_past_like_time_series_split(ctx: WorkerContext) -> None:
    from sklearn.model_selection import TimeSeriesSplit

    # Diabetes (bundled with scikit-learn) with a distinct day per row, the file in another order.
    frame = load_diabetes(as_frame=True).frame
    frame["day"] = np.random.default_rng(2).permutation(len(frame))
    dev, hold = frame.iloc[:400], frame.iloc[400:]
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="time", folds=3, seed=0,
                          time_column="day")
    features = [c for c in dev.columns if c not in ("target", "day")]
    config = searched(config_document(dataset, "Ridge", features=features, metrics=["rmse"]),
                      grid={"alpha": ALPHAS})
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 3)

    # Reference: GridSearchCV(cv=TimeSeriesSplit(3)) on each outer fold's training rows sorted by day.
    plan = FoldPlan("time", 3, 0)
    outer = fold_splits(plan, split_keys_from_frame(dev, plan, "target", None, "day"))
    X, y, day = dev[features].to_numpy(), dev["target"].to_numpy(), dev["day"].to_numpy()
    for split, row in zip(outer, rows, strict=True):
        assert row["status"] == "ok", row["error"]
        train = split.train[np.argsort(day[split.train], kind="stable")]
        search = GridSearchCV(Pipeline([("model", Ridge(random_state=0))]), {"model__alpha": ALPHAS},
                              scoring="neg_root_mean_squared_error", cv=TimeSeriesSplit(3))
        search.fit(X[train], y[train])
        assert row["search"]["best_params"] == {"alpha": search.best_params_["model__alpha"]}
        assert row["search"]["best_inner_score"] == pytest.approx(-search.best_score_, rel=1e-8)
        rmse = skm.root_mean_squared_error(y[split.test], search.predict(X[split.test]))
        assert row["scores"]["rmse"] == pytest.approx(rmse, rel=1e-8)
