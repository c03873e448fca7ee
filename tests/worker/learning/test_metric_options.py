"""Metrics with declared choices (averages, positive label, quantile, power) against sklearn.metrics.

Every value here is checked against scikit-learn's own function called with the same arguments on the
same predictions, on datasets bundled with scikit-learn (breast cancer, wine, iris, diabetes),
arranged to show the problem: subsets that lack a class, string labels, targets with zeros.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics as skm
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris, load_wine
from sklearn.linear_model import LogisticRegression, PoissonRegressor
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler, label_binarize

from service.catalog.metric_keys import resolve_metric
from service.catalog.metrics import METRICS, spec_of
from worker.learning.per_row import per_example
from worker.learning.scoring import class_labels, compute, score_model, score_predictions


def _fitted(X: np.ndarray, y: np.ndarray) -> object:
    return make_pipeline(StandardScaler(), LogisticRegression(max_iter=5000)).fit(X, y)


def _key(request: object, task: str, classes: list[str] | None = None) -> str:
    return resolve_metric(request, task, classes)


@pytest.mark.parametrize("average", ["micro", "macro", "weighted"])
def test_precision_recall_f1_averages_equal_sklearn_on_wine(average: str) -> None:
    # Reference: sklearn.metrics.precision_score / recall_score / f1_score(average=...) (wine, bundled).
    X, y = load_wine(return_X_y=True)
    model = _fitted(X[::3], y[::3])
    pred = model.predict(X)
    classes = class_labels(y)
    keys = [_key(f"{name}(average={average})", "classification", ["0", "1", "2"])
            for name in ("precision", "recall", "f1")]
    scores, undefined = score_predictions(y, pred, None, classes, keys)
    assert undefined == {}
    for key, function in zip(keys, (skm.precision_score, skm.recall_score, skm.f1_score), strict=True):
        assert scores[key] == function(y, pred, labels=classes, average=average)


def test_binary_average_uses_the_declared_positive_label() -> None:
    # Reference: sklearn.metrics.*_score(pos_label=..., average="binary") (breast cancer, bundled);
    # labels as strings, so the declared label "malignant" is classes[0], not the default classes[1].
    data = load_breast_cancer()
    y = np.where(data.target == 0, "malignant", "benign")
    model = _fitted(data.data, y)
    pred = model.predict(data.data)
    classes = class_labels(y)
    key = _key({"name": "recall", "pos_label": "malignant"}, "classification", ["benign", "malignant"])
    assert key == "recall(average=binary;pos_label=malignant)"
    assert compute(key, y, pred, None, classes) == skm.recall_score(y, pred, pos_label="malignant")
    default = _key("recall", "classification", ["benign", "malignant"])
    assert default == "recall(average=binary;pos_label=malignant)"  # classes[1] in sorted order
    key = _key("precision(average=binary;pos_label=benign)", "classification", ["benign", "malignant"])
    assert compute(key, y, pred, None, classes) == skm.precision_score(y, pred, pos_label="benign")
    macro = _key("f1(average=macro)", "classification", ["benign", "malignant"])
    assert compute(macro, y, pred, None, classes) == skm.f1_score(y, pred, average="macro")


def test_multiclass_metrics_keep_the_dataset_classes_on_a_subset_without_one() -> None:
    # Iris rows of classes 0 and 1 only, scored against the dataset's three classes: scikit-learn's
    # f1_score with labels=[0, 1, 2] is the reference.
    X, y = load_iris(return_X_y=True)
    classes = np.array([0, 1, 2])
    model = _fitted(X, y)
    rows = y < 2
    pred, proba = model.predict(X[rows]), model.predict_proba(X[rows])
    macro = _key("f1", "classification", ["0", "1", "2"])
    assert macro == "f1(average=macro)"
    expected = skm.f1_score(y[rows], pred, labels=classes, average="macro")
    scores, undefined = score_predictions(y[rows], pred, proba, classes,
                                          [macro, "average_precision(average=weighted)",
                                           "average_precision(average=macro)", "matthews_corrcoef"])
    assert scores[macro] == expected
    # weighted AP on the one-vs-rest indicator of the dataset's classes (sklearn's multilabel form).
    indicator = label_binarize(y[rows], classes=classes)
    with pytest.warns(UserWarning):
        weighted = skm.average_precision_score(indicator, proba, average="weighted")
    assert scores["average_precision(average=weighted)"] == weighted
    # macro AP is undefined when a class has no scored row: None with the reason.
    assert scores["average_precision(average=macro)"] is None
    assert "class 2" in undefined["average_precision(average=macro)"]
    # matthews_corrcoef takes no labels: a class absent from labels and predictions adds a zero row
    # and column to the confusion matrix, which leaves Gorodkin's R_K unchanged.
    assert scores["matthews_corrcoef"] == skm.matthews_corrcoef(y[rows], pred)


def test_average_precision_equals_sklearn() -> None:
    # Reference: sklearn.metrics.average_precision_score (breast cancer binary; wine one-vs-rest).
    X, y = load_breast_cancer(return_X_y=True)
    model = _fitted(X[::2], y[::2])
    scores, undefined = score_model(model, X, y, ["average_precision(pos_label=1)", "average_precision(pos_label=0)"],
                                    class_labels(y))
    proba = model.predict_proba(X)
    assert undefined == {}
    assert scores["average_precision(pos_label=1)"] == skm.average_precision_score(y, proba[:, 1])
    assert scores["average_precision(pos_label=0)"] == skm.average_precision_score(y == 0, proba[:, 0])
    X, y = load_wine(return_X_y=True)
    model = _fitted(X[::2], y[::2])
    keys = [f"average_precision(average={a})" for a in ("micro", "macro", "weighted")]
    scores, undefined = score_model(model, X, y, keys, class_labels(y))
    proba = model.predict_proba(X)
    assert undefined == {}
    for key, average in zip(keys, ("micro", "macro", "weighted"), strict=True):
        # sklearn >= 1.3 binarises a multiclass y itself; every wine class is present, so the two agree.
        assert scores[key] == skm.average_precision_score(y, proba, average=average)


def test_matthews_and_balanced_accuracy_equal_sklearn_on_wine() -> None:
    # Reference: sklearn.metrics.matthews_corrcoef, balanced_accuracy_score (wine, bundled).
    X, y = load_wine(return_X_y=True)
    model = _fitted(X[:120], y[:120])  # sorted by class: the first 120 rows barely hold class 2
    scores, undefined = score_model(model, X, y, ["matthews_corrcoef", "balanced_accuracy"], class_labels(y))
    pred = model.predict(X)
    assert undefined == {}
    assert scores["matthews_corrcoef"] == skm.matthews_corrcoef(y, pred)
    assert scores["balanced_accuracy"] == skm.balanced_accuracy_score(y, pred)


def test_regression_metrics_equal_sklearn_on_diabetes() -> None:
    # Reference: sklearn.metrics functions with the same alpha / power (diabetes, bundled; target > 0).
    X, y = load_diabetes(return_X_y=True)
    model = PoissonRegressor(alpha=1e-3, max_iter=1000).fit(X, y)
    pred = model.predict(X)
    keys = {
        "explained_variance": skm.explained_variance_score(y, pred),
        "median_absolute_error": skm.median_absolute_error(y, pred),
        "mape": skm.mean_absolute_percentage_error(y, pred),
        _key("pinball_loss(alpha=0.9)", "regression"): skm.mean_pinball_loss(y, pred, alpha=0.9),
        _key({"name": "pinball_loss", "alpha": 0.1}, "regression"): skm.mean_pinball_loss(y, pred, alpha=0.1),
        "poisson_deviance": skm.mean_poisson_deviance(y, pred),
        "gamma_deviance": skm.mean_gamma_deviance(y, pred),
        _key({"name": "tweedie_deviance", "power": 1.5}, "regression"): skm.mean_tweedie_deviance(y, pred, power=1.5),
        _key("tweedie_deviance(power=3)", "regression"): skm.mean_tweedie_deviance(y, pred, power=3),
    }
    assert "pinball_loss(alpha=0.9)" in keys and "tweedie_deviance(power=3.0)" in keys
    scores, undefined = score_model(model, X, y, list(keys))
    assert undefined == {}
    for key, expected in keys.items():
        assert scores[key] == expected, key


def test_deviance_of_a_non_positive_prediction_is_undefined_with_the_reason() -> None:
    # scikit-learn's mean_gamma_deviance raises on y_pred <= 0 ("strictly positive y and y_pred").
    scores, undefined = score_predictions(np.array([1.0, 2.0]), np.array([1.0, -1.0]), None, None,
                                          ["gamma_deviance", "poisson_deviance", "tweedie_deviance(power=0.0)"])
    assert scores["gamma_deviance"] is None and "strictly positive" in undefined["gamma_deviance"]
    assert scores["poisson_deviance"] is None
    # power 0 is the squared error, defined for any prediction (scikit-learn mean_tweedie_deviance docstring).
    assert scores["tweedie_deviance(power=0.0)"] == skm.mean_squared_error([1.0, 2.0], [1.0, -1.0])


def test_every_metric_has_a_range_containing_its_values_and_a_direction() -> None:
    # Ranges as scikit-learn documents them: scores <= 1 (r2, explained variance unbounded below),
    # Matthews in [-1, 1], probabilities-based ranking scores in [0, 1], losses and deviances >= 0.
    lower_better = {m.name for m in METRICS.values() if not m.greater_is_better}
    assert lower_better == {"rmse", "mse", "mae", "median_absolute_error", "mape", "pinball_loss",
                            "poisson_deviance", "gamma_deviance", "tweedie_deviance", "log_loss", "brier"}
    assert spec_of("matthews_corrcoef").bounds == (-1.0, 1.0)
    assert spec_of("f1(average=weighted)").bounds == (0.0, 1.0)
    assert spec_of("explained_variance").bounds == (None, 1.0)
    assert spec_of("pinball_loss(alpha=0.9)").bounds == (0.0, None)


@pytest.mark.parametrize("key", ["pinball_loss(alpha=0.9)", "pinball_loss(alpha=0.25)", "mape", "poisson_deviance",
                                 "gamma_deviance", "tweedie_deviance(power=1.5)", "tweedie_deviance(power=3.0)",
                                 "tweedie_deviance(power=-1.0)", "tweedie_deviance(power=0.0)"])
def test_per_row_values_average_to_sklearns_metric(key: str) -> None:
    # The parameter-free ladder compares per-row holdout values; their mean must be scikit-learn's metric
    # (same function, same arguments, diabetes bundled with scikit-learn, predictions of a Poisson GLM).
    X, y = load_diabetes(return_X_y=True)
    pred = PoissonRegressor(alpha=1e-3, max_iter=1000).fit(X, y).predict(X)
    rows = per_example(key, y, pred, None, None)
    assert rows is not None and rows.shape == y.shape
    assert float(rows.mean()) == pytest.approx(compute(key, y, pred), rel=1e-12)


def test_no_per_row_values_where_the_metric_is_undefined_or_not_a_mean() -> None:
    assert per_example("gamma_deviance", np.array([0.0, 1.0]), np.array([1.0, 1.0]), None, None) is None
    assert per_example("median_absolute_error", np.array([0.0, 1.0]), np.array([1.0, 1.0]), None, None) is None
    assert per_example("f1(average=macro)", np.array([0, 1]), np.array([0, 1]), None, np.array([0, 1])) is None
