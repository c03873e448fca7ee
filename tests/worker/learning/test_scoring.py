"""Metrics: published check values, and equality with sklearn.metrics on the same predictions."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris
from sklearn.dummy import DummyClassifier
from sklearn.exceptions import UndefinedMetricWarning
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.model_selection import KFold
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from service.catalog.metrics import METRICS
from tests.support.class_sets import multiclass_reference, padded, sorted_by_class
from worker.learning.scoring import METRIC_FUNCTIONS, compute, score_model

Y_TRUE = [3, -0.5, 2, 7]
Y_PRED = [2.5, 0.0, 2, 8]


def test_every_registry_metric_is_computed() -> None:
    assert set(METRIC_FUNCTIONS) == set(METRICS)


@pytest.mark.parametrize(("name", "expected"), [
    # scikit-learn mean_squared_error docstring example: y=[3,-0.5,2,7], y_pred=[2.5,0,2,8] -> 0.375.
    ("mse", 0.375),
    # scikit-learn root_mean_squared_error docstring example (same data) -> 0.612...; REFERENCES: 0.612372.
    ("rmse", 0.612372),
    # scikit-learn mean_absolute_error docstring example (same data) -> 0.5.
    ("mae", 0.5),
    # scikit-learn r2_score docstring example (same data) -> 0.948...; REFERENCES: 0.948608.
    ("r2", 0.948608),
])
def test_regression_check_values(name: str, expected: float) -> None:
    assert compute(name, Y_TRUE, Y_PRED) == pytest.approx(expected, abs=1e-6)


def test_textbook_cost_is_half_the_mse() -> None:
    # REFERENCES (computed): J = 1/(2m) sum (h - y)^2 = 0.1875 on the same data, i.e. MSE / 2.
    value = compute("mse", Y_TRUE, Y_PRED)
    assert value is not None and value / 2 == pytest.approx(0.1875, abs=1e-12)


def test_regression_metrics_equal_sklearn_on_diabetes() -> None:
    # Reference: sklearn.metrics on the same predictions (diabetes, bundled with scikit-learn).
    X, y = load_diabetes(return_X_y=True)
    model = LinearRegression().fit(X, y)
    scores, undefined = score_model(model, X, y, ["rmse", "mse", "mae", "r2"])
    pred = model.predict(X)
    assert undefined == {}
    assert scores["rmse"] == pytest.approx(skm.root_mean_squared_error(y, pred), rel=1e-12)
    assert scores["mse"] == pytest.approx(skm.mean_squared_error(y, pred), rel=1e-12)
    assert scores["mae"] == pytest.approx(skm.mean_absolute_error(y, pred), rel=1e-12)
    # Efron et al. 2004 via REFERENCES: OLS on all 442 rows, R^2 = 0.51775 (tolerance 1e-5).
    assert scores["r2"] == pytest.approx(0.51775, abs=1e-5)


def test_binary_metrics_equal_sklearn_on_breast_cancer() -> None:
    # Reference: sklearn.metrics on the same predictions (breast cancer, bundled with scikit-learn).
    X, y = load_breast_cancer(return_X_y=True)
    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)).fit(X, y)
    names = ["accuracy", "balanced_accuracy", "f1", "roc_auc", "log_loss", "brier"]
    scores, undefined = score_model(model, X, y, names)
    pred, proba = model.predict(X), model.predict_proba(X)
    assert undefined == {}
    assert scores["accuracy"] == skm.accuracy_score(y, pred)
    assert scores["balanced_accuracy"] == skm.balanced_accuracy_score(y, pred)
    assert scores["f1"] == skm.f1_score(y, pred, pos_label=1)
    assert scores["roc_auc"] == skm.roc_auc_score(y, proba[:, 1])
    assert scores["log_loss"] == skm.log_loss(y, proba)
    assert scores["brier"] == skm.brier_score_loss(y, proba[:, 1])


def test_binary_positive_class_is_the_larger_label() -> None:
    # With string labels the positive class is classes_[1] (sorted), here "yes".
    y = np.array(["no", "yes", "yes", "no", "yes", "no"])
    pred = np.array(["no", "yes", "no", "no", "yes", "yes"])
    proba = np.array([[.9, .1], [.2, .8], [.6, .4], [.7, .3], [.1, .9], [.4, .6]])
    classes = np.array(["no", "yes"])
    assert compute("f1", y, pred, proba, classes) == skm.f1_score(y, pred, pos_label="yes")
    assert compute("roc_auc", y, pred, proba, classes) == skm.roc_auc_score(y == "yes", proba[:, 1])
    assert compute("brier", y, pred, proba, classes) == skm.brier_score_loss(y, proba[:, 1], pos_label="yes")


def test_multiclass_metrics_equal_sklearn_on_iris() -> None:
    # Reference: sklearn.metrics on the same predictions (iris, bundled with scikit-learn).
    X, y = load_iris(return_X_y=True)
    model = LogisticRegression(max_iter=2000).fit(X, y)
    scores, undefined = score_model(model, X, y, ["accuracy", "f1", "roc_auc", "log_loss", "brier"])
    pred, proba = model.predict(X), model.predict_proba(X)
    assert scores["f1"] == skm.f1_score(y, pred, average="macro")
    assert scores["roc_auc"] == skm.roc_auc_score(y, proba, multi_class="ovr", average="macro")
    assert scores["log_loss"] == skm.log_loss(y, proba)
    # brier is binary only: undefined here, with the reason.
    assert scores["brier"] is None and "binary" in undefined["brier"]


def test_metric_undefined_on_a_one_class_fold_is_none() -> None:
    y = np.array([1, 1, 1])
    proba = np.array([[.2, .8], [.3, .7], [.4, .6]])
    with pytest.warns(UndefinedMetricWarning):
        assert np.isnan(skm.roc_auc_score(y, proba[:, 1]))  # scikit-learn: undefined with one class

    class Fixed:
        classes_ = np.array([0, 1])

        def predict(self, X: object) -> np.ndarray:
            return np.array([1, 1, 0])

        def predict_proba(self, X: object) -> np.ndarray:
            return proba

    with pytest.warns(Warning):
        scores, _ = score_model(Fixed(), None, y, ["accuracy", "roc_auc"])
    assert scores["accuracy"] == pytest.approx(2 / 3)
    assert scores["roc_auc"] is None


def test_non_finite_values_become_none() -> None:
    # r2 of a constant target: scikit-learn returns nan (with a warning) unless predictions are perfect.
    with pytest.warns(Warning):
        assert compute("r2", [1.0], [2.0]) is None


@pytest.mark.parametrize("name", ["rmse", "r2", "mae", "pinball_loss(alpha=0.9)"])
def test_values_scikit_learn_rejects_are_still_rejected(name: str) -> None:
    # Without options a regression metric skips scikit-learn's parameter validation; its checks of the values
    # themselves (here: as many predictions as targets, all finite) must still run, as they do with options.
    with pytest.raises(ValueError, match="inconsistent numbers of samples"):
        compute(name, [1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="NaN"):
        compute(name, [1.0, 2.0, 3.0], [1.0, float("nan"), 3.0])


@pytest.mark.parametrize("name", ["wine", "iris"])
def test_folds_missing_a_class_score_on_the_dataset_classes_like_sklearn_with_labels(name: str) -> None:
    # Reference: sklearn.metrics called with explicit labels= (the dataset's classes) on the fold
    # model's probabilities padded by hand to every class, on the same KFold(3, shuffle=False) indices
    # of wine / iris (bundled with scikit-learn) sorted by class.
    X, y = sorted_by_class(name)
    classes = np.unique(y)
    metrics = ["accuracy", "f1", "roc_auc", "log_loss"]
    missing_in_training, auc_defined_without_a_class = 0, 0
    for train, test in KFold(3, shuffle=False).split(X):
        model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)).fit(X[train], y[train])
        scores, undefined = score_model(model, X[test], y[test], metrics, classes)
        proba = padded(model.predict_proba(X[test]), model[-1].classes_, classes)
        expected = multiclass_reference(y[test], model.predict(X[test]), proba, classes)
        for metric in metrics:
            want = expected[metric]
            assert scores[metric] == (None if want is None else pytest.approx(want, rel=1e-12)), (name, metric)
            # An undefined metric is None with scikit-learn's reason; a defined one has none.
            assert (metric in undefined) == (expected[metric] is None), (name, metric, undefined)
        lacking = len(np.unique(y[train])) < len(classes)
        missing_in_training += lacking
        auc_defined_without_a_class += lacking and expected["roc_auc"] is not None
        if len(np.unique(y[test])) < len(classes):
            assert "one class" in undefined["roc_auc"].lower()
    assert missing_in_training >= 1  # the case this test is about occurs
    if name == "iris":
        assert auc_defined_without_a_class == 1  # the middle fold: scored over all three classes


def test_a_binary_model_that_saw_one_class_is_scored_on_both() -> None:
    # Reference: sklearn.metrics with labels=[0, 1] on the prior baseline's padded probabilities, on
    # breast cancer (bundled with scikit-learn) sorted by class (212 malignant, 357 benign): the first
    # 285 rows as test rows (both classes), the rest as training rows (class 1 only).
    X, y = load_breast_cancer(return_X_y=True)
    order = np.argsort(y, kind="stable")
    X, y = X[order], y[order]
    classes = np.array([0, 1])
    train, test = np.arange(285, len(y)), np.arange(285)  # training rows: class 1 only
    model = DummyClassifier(strategy="prior").fit(X[train], y[train])
    assert list(model.classes_) == [1]
    scores, undefined = score_model(model, X[test], y[test], ["accuracy", "f1", "roc_auc", "log_loss", "brier"],
                                    classes)
    proba = padded(model.predict_proba(X[test]), model.classes_, classes)
    pred = model.predict(X[test])
    assert undefined == {}
    assert scores["accuracy"] == skm.accuracy_score(y[test], pred)
    assert scores["f1"] == skm.f1_score(y[test], pred, labels=classes, pos_label=1)
    assert scores["roc_auc"] == skm.roc_auc_score(y[test], proba[:, 1]) == 0.5  # one score for every row
    assert scores["log_loss"] == skm.log_loss(y[test], proba, labels=classes)
    assert scores["brier"] == skm.brier_score_loss(y[test], proba[:, 1], pos_label=1)
