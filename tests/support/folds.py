"""Fold runs shared by the worker tests: every fold of a submission, and scaled Ridge on diabetes
checked against scikit-learn's cross_validate on the same folds."""

from __future__ import annotations

from typing import Any

import pandas as pd
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.model_selection import KFold, cross_validate
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.records import submissions
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs import runtime
from worker.jobs.runtime import WorkerContext

REGRESSION_SCORING = {"rmse": "neg_root_mean_squared_error", "mse": "neg_mean_squared_error",
                      "mae": "neg_mean_absolute_error", "r2": "r2"}
SIGN = {"rmse": -1, "mse": -1, "mae": -1, "r2": 1, "accuracy": 1, "balanced_accuracy": 1, "f1": 1,
        "roc_auc": 1, "log_loss": -1, "brier": -1}


def run_all_folds(sub_id: str, folds: int, repeats: int = 1) -> list[dict[str, Any]]:
    for r in range(repeats):
        for f in range(folds):
            jobs.run_fold(sub_id, r, f)
    return submissions.fold_rows(runtime.current().engine, sub_id)


def diabetes_parts() -> tuple[pd.DataFrame, pd.DataFrame]:
    # Diabetes (Efron et al. 2004; bundled with scikit-learn): 400 development rows, 42 held out.
    frame = load_diabetes(as_frame=True).frame
    return frame.iloc[:400], frame.iloc[400:]


def ridge_diabetes_submission(ctx: WorkerContext) -> str:
    """Store diabetes (its 5-fold plan: KFold(5, shuffle=True, random_state=11)) and a queued submission of
    scaled Ridge(alpha=0.3) scored on ``REGRESSION_SCORING``'s metrics; return the submission's id."""
    dev, hold = diabetes_parts()
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=5, seed=11)
    features = [c for c in dev.columns if c != "target"]
    config = config_document(dataset, "Ridge", params={"alpha": 0.3}, features=features,
                             preprocess=[{"transformer": "StandardScaler", "columns": features}],
                             metrics=list(REGRESSION_SCORING))
    return add_submission(ctx, dataset, config)


def ridge_on_diabetes(
    ctx: WorkerContext,
) -> tuple[str, list[dict[str, Any]], dict[str, Any], list[str], Any]:
    """Run every fold of scaled Ridge(alpha=0.3) on diabetes; return (sub_id, fold rows, reference, features, cv).

    Reference: scikit-learn's cross_validate with the same pipeline on KFold(5, shuffle=True,
    random_state=11) (the vault's "kfold" plan is defined to be exactly that split), with train
    scores and fitted estimators.
    """
    sub_id = ridge_diabetes_submission(ctx)
    rows = run_all_folds(sub_id, 5)
    dev, _ = diabetes_parts()
    features = [c for c in dev.columns if c != "target"]
    X, y = dev[features].to_numpy(), dev["target"].to_numpy()
    cv = list(KFold(5, shuffle=True, random_state=11).split(X))
    reference = cross_validate(make_pipeline(StandardScaler(), Ridge(alpha=0.3)), X, y, cv=cv,
                               scoring=REGRESSION_SCORING, return_estimator=True, return_train_score=True)
    return sub_id, rows, reference, features, (X, y, cv)
