"""Learning curves on a table sorted by class: each size trains on a seeded shuffle, not the file's order."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import KFold, learning_curve
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.records import submissions
from service.submission.document import submission_document
from tests.support.folds import run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext

FRACTIONS = [0.1, 0.325, 0.55, 0.775, 1.0]
SEED = 7


def test_curve_points_equal_sklearn_on_a_seeded_shuffle_of_each_training_fold(ctx: WorkerContext) -> None:
    # Breast cancer (bundled with scikit-learn) sorted by class: 212 malignant rows, then 357 benign.
    frame = load_breast_cancer(as_frame=True).frame.sort_values("target", kind="stable").reset_index(drop=True)
    frame.columns = [c.replace(" ", "_") for c in frame.columns]
    features = [c for c in frame.columns if c != "target"]
    dataset = add_dataset(ctx, frame, frame.iloc[:10], "target", "classification", scheme="kfold", folds=5,
                          seed=SEED)
    config = config_document(dataset, "LogisticRegression", params={"max_iter": 5000}, features=features,
                             metrics=["accuracy", "roc_auc"],
                             preprocess=[{"transformer": "StandardScaler", "columns": features}])
    config["validation"]["learning_curve"] = FRACTIONS
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 5)

    # Reference, by hand: the vault's kfold plan is KFold(5, shuffle=True, random_state=seed); each
    # fold's training indices are permuted by numpy's default_rng([seed, repeat, fold]), as
    # learning_curve(shuffle=True) permutes them, and each size fits on the first n of them (n from
    # learning_curve's rule on the first split's training rows), scored with sklearn.metrics; the last
    # point is the fold's own fit on all its training rows.
    X, y = frame[features].to_numpy(), frame["target"].to_numpy()
    cv = list(KFold(5, shuffle=True, random_state=SEED).split(X))
    sizes = [int(np.clip(int(f * len(cv[0][0])), 1, len(cv[0][0]))) for f in FRACTIONS]
    for k, (train, test) in enumerate(cv):
        order = np.random.default_rng([SEED, 0, k]).permutation(train)
        assert len(np.unique(y[train[: sizes[0]]])) == 1  # the file's first 10 % hold one class only
        for point, n in zip(rows[k]["curve"], sizes, strict=True):
            assert point["train_rows"] == n and "error" not in point, point
            rows_n = order[:n] if n < len(train) else train
            model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)).fit(X[rows_n], y[rows_n])
            assert point["scores"]["accuracy"] == pytest.approx(skm.accuracy_score(y[test], model.predict(X[test])),
                                                                rel=1e-12), (k, n)
            assert point["scores"]["roc_auc"] == pytest.approx(
                skm.roc_auc_score(y[test], model.predict_proba(X[test])[:, 1]), rel=1e-9), (k, n)
            assert point["train_scores"]["accuracy"] == pytest.approx(
                skm.accuracy_score(y[rows_n], model.predict(X[rows_n])), rel=1e-12), (k, n)

    # The same through scikit-learn's own learning_curve: given the permuted training indices it takes
    # the same prefixes (what shuffle=True does with its own permutation).
    shuffled = [(np.random.default_rng([SEED, 0, k]).permutation(train), test) for k, (train, test) in enumerate(cv)]
    got_sizes, _, test_scores = learning_curve(make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)),
                                               X, y, train_sizes=FRACTIONS, cv=shuffled, scoring="accuracy")
    assert list(got_sizes) == sizes
    for k, row in enumerate(rows):
        assert [p["scores"]["accuracy"] for p in row["curve"]] == pytest.approx(list(test_scores[:, k]), rel=1e-12)

    jobs.summarize(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    assert sub["cv_summary"]["learning_curve"][0]["folds"] == 5  # the 10 % point holds on every fold
    assert "seeded shuffle" in sub["cv_summary"]["learning_curve_note"]
    document = submission_document(ctx.engine, sub)
    assert document["result"]["learning_curve_note"] == sub["cv_summary"]["learning_curve_note"]
