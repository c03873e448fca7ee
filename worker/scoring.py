"""Compute the metrics a submission asked for, with scikit-learn's own metric functions.

Classification conventions (the catalog and API describe the same):
- binary: the positive class is ``classes_[1]``, the larger label in scikit-learn's sorted order; ``f1``
  uses it as ``pos_label``, ``roc_auc`` and ``brier`` use the probability of it;
- multiclass: ``f1`` is the macro average, ``roc_auc`` one-vs-rest macro; ``brier`` is binary only.
Non-finite values (e.g. ``r2`` on a constant test fold) are reported as None.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from sklearn import metrics as skm

from service.metrics_spec import METRICS

Metric = Callable[[np.ndarray, np.ndarray | None, np.ndarray | None, np.ndarray], float]


def _binary(classes: np.ndarray, name: str) -> None:
    if len(classes) != 2:
        raise ValueError(f"{name} needs a binary target, got {len(classes)} classes")


def _f1(y: np.ndarray, pred: Any, _proba: Any, classes: np.ndarray) -> float:
    if len(classes) == 2:
        return float(skm.f1_score(y, pred, pos_label=classes[1], average="binary"))
    return float(skm.f1_score(y, pred, labels=classes, average="macro"))


def _roc_auc(y: np.ndarray, _pred: Any, proba: Any, classes: np.ndarray) -> float:
    if len(classes) == 2:
        return float(skm.roc_auc_score(y == classes[1], proba[:, 1]))
    return float(skm.roc_auc_score(y, proba, multi_class="ovr", average="macro", labels=classes))


def _brier(y: np.ndarray, _pred: Any, proba: Any, classes: np.ndarray) -> float:
    _binary(classes, "brier")
    return float(skm.brier_score_loss(y, proba[:, 1], pos_label=classes[1]))


METRIC_FUNCTIONS: dict[str, Metric] = {
    "rmse": lambda y, pred, _p, _c: float(skm.root_mean_squared_error(y, pred)),
    "mse": lambda y, pred, _p, _c: float(skm.mean_squared_error(y, pred)),
    "mae": lambda y, pred, _p, _c: float(skm.mean_absolute_error(y, pred)),
    "r2": lambda y, pred, _p, _c: float(skm.r2_score(y, pred)),
    "accuracy": lambda y, pred, _p, _c: float(skm.accuracy_score(y, pred)),
    "balanced_accuracy": lambda y, pred, _p, _c: float(skm.balanced_accuracy_score(y, pred)),
    "f1": _f1,
    "roc_auc": _roc_auc,
    "log_loss": lambda y, _pred, proba, classes: float(skm.log_loss(y, proba, labels=classes)),
    "brier": _brier,
}


def compute(
    name: str, y_true: Any, y_pred: Any = None, proba: Any = None, classes: Any = None
) -> float | None:
    """Return one metric from labels or values, predictions and (for some) class probabilities."""
    y = np.asarray(y_true)
    labels = np.asarray(classes) if classes is not None else np.array([])
    if METRICS[name].task == "classification" and classes is None:
        labels = np.unique(y)
    value = METRIC_FUNCTIONS[name](y, None if y_pred is None else np.asarray(y_pred),
                                   None if proba is None else np.asarray(proba), labels)
    return value if math.isfinite(value) else None


def score_model(
    model: Any, X: Any, y: Any, metric_names: Sequence[str]
) -> tuple[dict[str, float | None], dict[str, str]]:
    """Predict once (labels and/or probabilities as the metrics need) and compute every metric.

    Returns the scores and, per metric scikit-learn could not compute on these rows (e.g. ``roc_auc``
    on a fold with one class), its message; such a metric scores None.
    """
    needs_proba = any(METRICS[m].needs_proba for m in metric_names)
    needs_pred = any(not METRICS[m].needs_proba for m in metric_names)
    pred = model.predict(X) if needs_pred else None
    proba = model.predict_proba(X) if needs_proba else None
    classes = getattr(model, "classes_", None)
    scores: dict[str, float | None] = {}
    undefined: dict[str, str] = {}
    for name in metric_names:
        try:
            scores[name] = compute(name, y, pred, proba, classes)
        except ValueError as exc:
            scores[name], undefined[name] = None, str(exc)
    return scores, undefined
