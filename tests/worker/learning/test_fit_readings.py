"""Train-fold scores and learning curves: equal to scikit-learn's cross_validate and learning_curve."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics as skm
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.model_selection import KFold, cross_validate, learning_curve
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.tree import DecisionTreeRegressor

from service.records import submissions
from service.submission.document import submission_document
from service.vault.folds import FoldPlan, fold_splits, split_keys_from_frame
from tests.support.folds import REGRESSION_SCORING, SIGN, diabetes_parts, ridge_on_diabetes, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.learning import scoring as worker_scoring
from worker.learning.fit_readings import BIAS, NEITHER, VARIANCE
from worker.learning.scoring import training_sample


def test_train_scores_equal_cross_validate_return_train_score(ctx: WorkerContext) -> None:
    # Reference: cross_validate(return_train_score=True) on the same folds (see ridge_on_diabetes).
    sub_id, rows, reference, _, _ = ridge_on_diabetes(ctx)
    for k, row in enumerate(rows):
        for name in REGRESSION_SCORING:
            assert row["train_scores"][name] == pytest.approx(SIGN[name] * reference[f"train_{name}"][k], rel=1e-10)
            assert row["scores"][name] == pytest.approx(SIGN[name] * reference[f"test_{name}"][k], rel=1e-10)

    jobs.summarize(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    gap = sub["cv_summary"]["fit_gap"]["metrics"]
    for name in REGRESSION_SCORING:
        train_mean = SIGN[name] * reference[f"train_{name}"].mean()
        valid_mean = SIGN[name] * reference[f"test_{name}"].mean()
        assert gap[name]["train_mean"] == pytest.approx(train_mean, rel=1e-10)
        assert gap[name]["validation_mean"] == pytest.approx(valid_mean, rel=1e-10)
        oriented = (train_mean - valid_mean) * SIGN[name]  # positive: the training rows score better
        assert gap[name]["gap"] == pytest.approx(oriented, rel=1e-9)
    document = submission_document(ctx.engine, sub)
    assert document["result"]["cv"]["folds"][0]["train_scores"] == rows[0]["train_scores"]
    assert document["result"]["fit_gap"]["metrics"]["rmse"]["reading"] in (VARIANCE, BIAS, NEITHER)


def test_readings_tell_a_deep_tree_from_a_stump(ctx: WorkerContext) -> None:
    # A fully grown tree fits its training rows exactly (train rmse 0) and is far worse on the validation
    # rows; a tree of depth 1 on a feature that carries no signal is about as bad on both as the mean.
    dev, hold = diabetes_parts()
    dev, hold = dev.copy(), hold.copy()
    rng = np.random.default_rng(0)
    dev["noise"], hold["noise"] = rng.normal(size=len(dev)), rng.normal(size=len(hold))
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=4, seed=2)
    readings = {}
    for label, params, features in (("deep", {"max_depth": None}, ["bmi", "s5", "bp"]),
                                    ("stump", {"max_depth": 1, "min_samples_leaf": 150}, ["noise"])):
        config = config_document(dataset, "DecisionTreeRegressor", params=params, features=features,
                                 metrics=["rmse", "r2"])
        sub_id = add_submission(ctx, dataset, config)
        run_all_folds(sub_id, 4)
        jobs.summarize(sub_id)
        sub = submissions.get(ctx.engine, sub_id)
        assert sub is not None
        readings[label] = sub["cv_summary"]["fit_gap"]["metrics"]
    assert readings["deep"]["rmse"]["train_mean"] == pytest.approx(0.0, abs=1e-9)
    assert readings["deep"]["rmse"]["reading"] == VARIANCE
    assert readings["stump"]["r2"]["reading"] == BIAS
    # Cross-check the deep tree's gap against cross_validate on the same folds.
    X, y = dev[["bmi", "s5", "bp"]].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(4, shuffle=True, random_state=2).split(X))
    reference = cross_validate(DecisionTreeRegressor(random_state=0), X, y, cv=cv, return_train_score=True,
                               scoring="neg_root_mean_squared_error")
    assert readings["deep"]["rmse"]["gap"] == pytest.approx(
        (-reference["test_score"]).mean() - (-reference["train_score"]).mean(), rel=1e-9)


def shuffled(cv: list[tuple[np.ndarray, np.ndarray]], seed: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Permute each split's training indices as learning_curve(shuffle=True) does, with the plan's seeds.

    scikit-learn's learning_curve with shuffle=True permutes every split's training indices once and
    fits on their prefixes; given splits whose training indices are already permuted, its default
    shuffle=False takes the same prefixes. The permutation is numpy's default_rng([seed, repeat, fold]).
    """
    return [(np.random.default_rng([seed, 0, k]).permutation(train), test) for k, (train, test) in enumerate(cv)]


def test_learning_curve_equals_sklearn_learning_curve(ctx: WorkerContext) -> None:
    dev, hold = diabetes_parts()  # 400 rows, 5 folds: every training fold has 320 rows
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=4)
    features = [c for c in dev.columns if c != "target"]
    fractions = [0.1, 0.5, 1.0]
    config = config_document(dataset, "Ridge", params={"alpha": 0.1}, features=features, metrics=["rmse", "r2"])
    config["validation"]["learning_curve"] = fractions
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 5)

    # Reference: scikit-learn's learning_curve with the same splits, their training indices permuted as
    # shuffle=True does (see ``shuffled``), fitting on the first n of them.
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    cv = shuffled(list(KFold(5, shuffle=True, random_state=4).split(X)), 4)
    for metric, scoring in (("rmse", "neg_root_mean_squared_error"), ("r2", "r2")):
        sizes, train, test = learning_curve(Ridge(alpha=0.1), X, y, train_sizes=fractions, cv=cv, scoring=scoring)
        assert [p["train_rows"] for p in rows[0]["curve"]] == list(sizes) == [32, 160, 320]
        for k, row in enumerate(rows):
            for i, point in enumerate(row["curve"]):
                assert point["fraction"] == fractions[i]
                assert point["train_scores"][metric] == pytest.approx(SIGN[metric] * train[i, k], rel=1e-10)
                assert point["scores"][metric] == pytest.approx(SIGN[metric] * test[i, k], rel=1e-10)
        jobs.summarize(sub_id)
        sub = submissions.get(ctx.engine, sub_id)
        assert sub is not None
        summary = sub["cv_summary"]["learning_curve"]
        assert [p["fraction"] for p in summary] == fractions
        for i, point in enumerate(summary):
            assert point["train_mean"][metric] == pytest.approx(SIGN[metric] * train[i].mean(), rel=1e-10)
            assert point["validation_mean"][metric] == pytest.approx(SIGN[metric] * test[i].mean(), rel=1e-10)


def test_learning_curve_on_stratified_classification_folds(ctx: WorkerContext) -> None:
    from sklearn.datasets import load_breast_cancer

    frame = load_breast_cancer(as_frame=True).frame
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    dev, hold = frame.iloc[:480], frame.iloc[480:]
    dataset = add_dataset(ctx, dev, hold, "target", "classification", scheme="stratified", folds=4, seed=3)
    features = ["mean_radius", "mean_texture", "worst_area", "worst_smoothness"]
    fractions = [0.2, 0.6, 1.0]
    config = config_document(dataset, "LogisticRegression", params={"max_iter": 5000}, features=features,
                             metrics=["accuracy"],
                             preprocess=[{"transformer": "StandardScaler", "columns": features}])
    config["validation"]["learning_curve"] = fractions
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 4)

    # Reference: learning_curve on the vault's own stratified splits (480 rows / 4 folds: 360 training rows each),
    # their training indices permuted as shuffle=True does (see ``shuffled``).
    plan = FoldPlan("stratified", 4, 3)
    cv = shuffled([(s.train, s.test) for s in fold_splits(plan, split_keys_from_frame(dev, plan, "target", None,
                                                                                       None))], 3)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    sizes, train, test = learning_curve(make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)),
                                        X, y, train_sizes=fractions, cv=cv, scoring="accuracy")
    assert [p["train_rows"] for p in rows[0]["curve"]] == list(sizes)
    for k, row in enumerate(rows):
        for i, point in enumerate(row["curve"]):
            assert point["train_scores"]["accuracy"] == pytest.approx(train[i, k], rel=1e-12)
            assert point["scores"]["accuracy"] == pytest.approx(test[i, k], rel=1e-12)


def test_training_sample_scores_every_row_up_to_the_limit_and_a_fixed_sample_above() -> None:
    assert training_sample(100_000, 0, 0) is None and training_sample(10, 0, 0, limit=10) is None
    sample = training_sample(800_000, 0, 3)
    assert sample is not None
    assert np.all(np.diff(sample) > 0) and sample[0] >= 0 and sample[-1] < 800_000  # rows in their order
    # A Bernoulli draw of p = 1/8 per row: the count is binomial(800,000, 1/8), sd ~296 (computed).
    assert abs(len(sample) - 100_000) < 6 * 296
    assert np.array_equal(sample, training_sample(800_000, 0, 3))  # the same rows for every submission
    assert not np.array_equal(sample[:1000], training_sample(800_000, 0, 4)[:1000])  # another fold, other rows


def test_above_the_limit_train_scores_are_scikit_learns_on_the_sampled_rows(
    ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    # With the limit lowered to 100 rows, each fold's 320 training rows are sampled. Reference: Ridge
    # fitted by scikit-learn on the fold's training rows (KFold(5, shuffle=True, random_state=11), the
    # plan's definition), its predictions on the sampled rows scored with sklearn.metrics; the test
    # scores stay cross_validate's (the fit that may overwrite its rows gives the same model).
    monkeypatch.setattr(worker_scoring, "TRAIN_SCORE_ROWS", 100)
    sub_id, rows, reference, _features, (X, y, cv) = ridge_on_diabetes(ctx)
    for k, row in enumerate(rows):
        train, _test = cv[k]
        sample = training_sample(len(train), 0, k)
        assert sample is not None and row["train_scored_rows"] == len(sample) < row["train_rows"] == len(train)
        model = reference["estimator"][k]
        predicted = model.predict(X[train][sample])
        assert row["train_scores"]["rmse"] == pytest.approx(
            skm.root_mean_squared_error(y[train][sample], predicted), rel=1e-10)
        assert row["train_scores"]["r2"] == pytest.approx(skm.r2_score(y[train][sample], predicted), rel=1e-10)
        assert row["scores"]["rmse"] == pytest.approx(-reference["test_rmse"][k], rel=1e-10)
        np.testing.assert_allclose(row["coefficients"]["values"][0], model[-1].coef_, rtol=1e-10)
    jobs.summarize(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    least = min(r["train_scored_rows"] for r in rows)
    assert sub["cv_summary"]["fit_gap"]["note"].endswith(f"training scores of 5 of 5 folds come from a seeded random "
                                                     f"sample of their training rows (at least {least} rows)")


def test_above_the_limit_learning_curve_points_score_a_sample_of_their_training_rows(
    ctx: WorkerContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Limit 100: the points on 160 and 320 training rows are scored on samples. Reference: Ridge fitted
    # by scikit-learn on the first n rows of the fold's training indices permuted by
    # numpy.random.default_rng([plan seed, repeat, fold]) (learning_curve's rule with shuffle=True; the
    # last point is the fold's own fit on its training rows), its predictions on the sampled rows of
    # those n scored with sklearn.metrics.
    monkeypatch.setattr(worker_scoring, "TRAIN_SCORE_ROWS", 100)
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=4)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, "Ridge", params={"alpha": 0.1}, features=features, metrics=["rmse"])
    config["validation"]["learning_curve"] = [0.1, 0.5, 1.0]
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 5)
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(5, shuffle=True, random_state=4).split(X))
    for k, row in enumerate(rows):
        for point in row["curve"]:
            n = point["train_rows"]
            train = cv[k][0]
            part = train if n == len(train) else np.random.default_rng([4, 0, k]).permutation(train)[:n]
            sample = training_sample(n, 0, k)
            rows_scored = part if sample is None else part[sample]
            assert point["train_scored_rows"] == len(rows_scored)
            predicted = Ridge(alpha=0.1).fit(X[part], y[part]).predict(X[rows_scored])
            assert point["train_scores"]["rmse"] == pytest.approx(
                skm.root_mean_squared_error(y[rows_scored], predicted), rel=1e-9), (k, n)
        assert [p["train_scored_rows"] < p["train_rows"] for p in row["curve"]] == [False, True, True]
