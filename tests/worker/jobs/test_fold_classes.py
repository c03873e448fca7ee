"""Fold jobs on a table sorted by class: every fold is scored against the dataset's classes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.dummy import DummyClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import KFold
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.records import submissions
from service.submission.document import submission_document
from tests.support.class_sets import multiclass_reference, padded, sorted_by_class
from tests.support.folds import run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext

METRICS = ["accuracy", "f1", "roc_auc", "log_loss"]


def test_contiguous_folds_of_a_class_sorted_table_score_every_class(ctx: WorkerContext) -> None:
    # iris sorted by class (setosa, the first 30 versicolor, virginica; bundled with scikit-learn) on a
    # contiguous 3-fold plan, which is scikit-learn's KFold(3, shuffle=False): the middle fold's training
    # rows hold no versicolor. Reference: sklearn.metrics with labels= the three classes on each fold
    # model's probabilities padded by hand, for the candidate and the prior baseline.
    X, y = sorted_by_class("iris")
    features = [f"x{j}" for j in range(X.shape[1])]
    dev = pd.DataFrame(X, columns=features).assign(target=y)
    dataset = add_dataset(ctx, dev, dev.iloc[:10], "target", "classification", scheme="contiguous", folds=3)
    config = config_document(dataset, "LogisticRegression", params={"max_iter": 5000}, features=features,
                             metrics=METRICS, preprocess=[{"transformer": "StandardScaler", "columns": features}])
    sub_id = add_submission(ctx, dataset, config)
    rows = run_all_folds(sub_id, 3)

    classes = np.unique(y)
    for k, (train, test) in enumerate(KFold(3, shuffle=False).split(X)):
        row = rows[k]
        assert row["status"] == "ok" and row["test_rows"] == len(test)
        model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)).fit(X[train], y[train])
        expected = multiclass_reference(y[test], model.predict(X[test]),
                                        padded(model.predict_proba(X[test]), model[-1].classes_, classes), classes)
        baseline = DummyClassifier(strategy="prior").fit(X[train], y[train])
        expected_baseline = multiclass_reference(
            y[test], baseline.predict(X[test]), padded(baseline.predict_proba(X[test]), baseline.classes_, classes),
            classes)
        for metric in METRICS:
            want, base = expected[metric], expected_baseline[metric]
            assert row["scores"][metric] == (None if want is None else pytest.approx(want, rel=1e-9)), (k, metric)
            assert row["baseline_scores"][metric] == (None if base is None else pytest.approx(base, rel=1e-9))
        # An undefined score carries scikit-learn's reason in the fold record, beside the scores.
        assert set(row["undefined"] or {}) == {m for m in METRICS if expected[m] is None}
    assert rows[1]["undefined"] is None and rows[1]["scores"]["roc_auc"] is not None  # all three classes tested
    assert "one class" in rows[0]["undefined"]["roc_auc"].lower()  # the first fold tests setosa alone

    jobs.summarize(sub_id)
    sub = submissions.get(ctx.engine, sub_id)
    assert sub is not None
    auc = sub["cv_summary"]["summary"]["roc_auc"]
    # The summary leaves the undefined folds out and says how many it used.
    assert (auc["n"], auc["undefined"]) == (1, 2) and auc["mean"] == pytest.approx(rows[1]["scores"]["roc_auc"])
    assert sub["cv_summary"]["summary"]["log_loss"]["undefined"] == 0
    folds = submission_document(ctx.engine, sub)["result"]["cv"]["folds"]
    assert folds[0]["undefined"] == rows[0]["undefined"] and "undefined" not in folds[1]
