"""Bundled tables sorted by class, and scikit-learn's metrics told every class: references for folds
whose training rows lack a class."""

from __future__ import annotations

import warnings
from collections.abc import Callable

import numpy as np
from sklearn import metrics as skm
from sklearn.datasets import load_iris, load_wine


def sorted_by_class(name: str) -> tuple[np.ndarray, np.ndarray]:
    """Return a bundled table sorted by class, so unshuffled folds leave a class out of training.

    "wine": all 178 rows (59 / 71 / 48 per class). "iris": the 50 setosa, the first 30 versicolor and
    the 50 virginica rows, so the middle fold of three holds every versicolor row and some of the
    other two classes: its training rows lack a class while its test rows hold all three.
    """
    X, y = (load_wine if name == "wine" else load_iris)(return_X_y=True)
    if name == "iris":
        keep = np.concatenate([np.arange(0, 80), np.arange(100, 150)])
        X, y = X[keep], y[keep]
    order = np.argsort(y, kind="stable")
    return X[order], y[order]


def padded(proba: np.ndarray, model_classes: np.ndarray, classes: np.ndarray) -> np.ndarray:
    """Return probabilities with a zero column for each class the model never saw, by hand."""
    full = np.zeros((len(proba), len(classes)))
    for j, label in enumerate(model_classes):
        full[:, list(classes).index(label)] = proba[:, j]
    return full


def reference_value(metric: Callable[[], float]) -> float | None:
    """Call scikit-learn's metric; None where it raises or gives a non-finite value (undefined)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            value = float(metric())
        except ValueError:
            return None
    return value if np.isfinite(value) else None


def multiclass_reference(
    y: np.ndarray, pred: np.ndarray, proba: np.ndarray, classes: np.ndarray
) -> dict[str, float | None]:
    """scikit-learn's accuracy, macro f1, one-vs-rest macro roc_auc and log_loss with ``labels=classes``."""
    return {
        "accuracy": reference_value(lambda: skm.accuracy_score(y, pred)),
        "f1": reference_value(lambda: skm.f1_score(y, pred, labels=classes, average="macro")),
        "roc_auc": reference_value(lambda: skm.roc_auc_score(y, proba, labels=classes, multi_class="ovr",
                                                             average="macro")),
        "log_loss": reference_value(lambda: skm.log_loss(y, proba, labels=classes)),
    }
