"""The fit's finite check of its input: skipped only where the registration already made it.

``worker.learning.pipeline.input_checked``: a pipeline of the estimator alone, on features and a target
the registration found finite in every development row, is fitted under scikit-learn's
``assume_finite``; anything else keeps every check, and a missing or infinite value still fails the
fold with scikit-learn's own message.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import sklearn
from sklearn.calibration import CalibratedClassifierCV
from sklearn.compose import TransformedTargetRegressor
from sklearn.ensemble import StackingRegressor
from sklearn.linear_model import Ridge
from sklearn.pipeline import Pipeline

from tests.support.folds import REGRESSION_SCORING, diabetes_parts, run_all_folds
from tests.support.worker_records import add_dataset, add_submission, config_document
from worker import jobs
from worker.jobs.runtime import WorkerContext
from worker.learning.pipeline import MODEL_STEP, input_checked

FEATURES = ["age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6"]


@pytest.fixture
def assumed(monkeypatch: pytest.MonkeyPatch) -> list[bool]:
    """Record, for every Ridge fit, whether scikit-learn was told to assume finite input."""
    seen: list[bool] = []
    fit = Ridge.fit

    def recording(self: Ridge, X: Any, y: Any, sample_weight: Any = None) -> Ridge:
        seen.append(bool(sklearn.get_config()["assume_finite"]))
        return fit(self, X, y, sample_weight)

    monkeypatch.setattr(Ridge, "fit", recording)
    return seen


def _submission(ctx: WorkerContext, dev: pd.DataFrame, hold: pd.DataFrame, **config: Any) -> str:
    dataset = add_dataset(ctx, dev, hold, "target", "regression", scheme="kfold", folds=4, seed=9)
    return add_submission(ctx, dataset, config_document(dataset, "Ridge", features=FEATURES,
                                                        metrics=list(REGRESSION_SCORING), **config))


def test_a_bare_estimator_on_rows_checked_at_registration_skips_the_scan(
    ctx: WorkerContext, assumed: list[bool]
) -> None:
    dev, hold = diabetes_parts()
    sub_id = _submission(ctx, dev, hold)
    rows = run_all_folds(sub_id, 4)
    assert [r["status"] for r in rows] == ["ok"] * 4
    assert jobs.score_holdout(sub_id)["holdout"] == "scored"
    assert assumed == [True] * 5  # four folds and the refit on every development row


def test_preprocessing_keeps_the_check(ctx: WorkerContext, assumed: list[bool]) -> None:
    # A transformer can make non-finite values of finite ones, so its output is checked as before.
    dev, hold = diabetes_parts()
    sub_id = _submission(ctx, dev, hold, preprocess=[{"transformer": "StandardScaler", "columns": FEATURES}])
    run_all_folds(sub_id, 4)
    assert assumed == [False] * 4


@pytest.mark.parametrize("value", [np.nan, np.inf], ids=["missing", "infinite"])
def test_a_non_finite_feature_still_fails_every_fold_with_scikit_learns_message(
    ctx: WorkerContext, assumed: list[bool], value: float
) -> None:
    dev, hold = diabetes_parts()
    dev = dev.copy()
    dev.loc[dev.index[17], "bmi"] = value
    sub_id = _submission(ctx, dev, hold)
    rows = run_all_folds(sub_id, 4)
    assert assumed == [False] * 4  # each fold's fit, the scan in place
    X, y = dev[FEATURES].to_numpy(), dev["target"].to_numpy()
    # scikit-learn's own words for this input, from Ridge on the same rows outside the service: in fit
    # for the three folds that train on the row, in predict for the one that tests it.
    with pytest.raises(ValueError) as in_fit:
        Ridge().fit(X, y)
    with pytest.raises(ValueError) as in_predict:
        Ridge().fit(np.delete(X, 17, axis=0), np.delete(y, 17)).predict(X[17:18])
    assert [r["status"] for r in rows] == ["failed"] * 4
    assert sorted(r["error"] for r in rows) == sorted([f"ValueError: {in_fit.value}"] * 3 +
                                                      [f"ValueError: {in_predict.value}"])
    assert all(r["scores"] is None for r in rows)


def test_a_meta_estimator_keeps_the_check() -> None:
    # A stack fits its final estimator on predictions it computed; a transformed target is computed too.
    def assumed_in(estimator: Any) -> bool:
        with input_checked(Pipeline([(MODEL_STEP, estimator)]), finite_input=True):
            return bool(sklearn.get_config()["assume_finite"])

    assert assumed_in(Ridge())
    assert not assumed_in(StackingRegressor([("ridge", Ridge())]))
    assert not assumed_in(TransformedTargetRegressor(regressor=Ridge(), func=np.log, inverse_func=np.exp))
    # Nested estimators left at their defaults (a LinearRegression, a linear SVM) are nesting all the same.
    assert not assumed_in(TransformedTargetRegressor(func=np.log, inverse_func=np.exp))
    assert not assumed_in(CalibratedClassifierCV())
