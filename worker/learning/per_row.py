"""Per-row values whose mean is a metric, for the parameter-free ladder's threshold.

The holdout job keeps them (sealed, ``worker.jobs.losses``) and the verdict job compares two
submissions' rows; they never leave the service.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.special import xlogy

from service.catalog.metric_keys import parse_key
from worker.learning.scoring import Options


def per_example(name: str, y_true: Any, pred: Any, proba: Any, classes: Any) -> np.ndarray | None:
    """Return per-row values whose mean is the metric (rmse: squared errors), or None if it has none.

    For the parameter-free ladder only; these values stay inside the service.
    """
    key, (name, options) = name, parse_key(name)
    y = np.asarray(y_true)
    if name in MEAN_OF_ROWS and pred is not None:
        return _regression_rows(name, options, y.astype(float), np.asarray(pred, dtype=float))
    if name != key:
        return None  # another metric's choices: none of them is a mean over rows
    if name in ("rmse", "mse"):
        return np.square(y.astype(float) - np.asarray(pred, dtype=float))
    if name == "mae":
        return np.abs(y.astype(float) - np.asarray(pred, dtype=float))
    if name == "accuracy":
        return (y == np.asarray(pred)).astype(float)
    if name in ("log_loss", "brier") and proba is not None and classes is not None:
        p = np.asarray(proba, dtype=float)
        column = np.searchsorted(np.asarray(classes), y)
        if name == "log_loss":
            # scikit-learn's log_loss clips probabilities to [eps, 1 - eps] with eps of the dtype.
            eps = np.finfo(p.dtype).eps
            return -np.log(np.clip(p[np.arange(len(y)), column], eps, 1 - eps))
        if p.shape[1] == 2:
            return np.square(p[:, 1] - (column == 1))
    return None


# Regression metrics that are a plain mean of per-row values (scikit-learn's own definitions).
MEAN_OF_ROWS = frozenset({"pinball_loss", "mape", "poisson_deviance", "gamma_deviance", "tweedie_deviance"})


def _regression_rows(name: str, options: Options, y: np.ndarray, pred: np.ndarray) -> np.ndarray | None:
    """Return per-row values whose mean is scikit-learn's metric, or None where the metric is undefined.

    Pinball and MAPE as in ``sklearn.metrics._regression`` (``mean_pinball_loss``,
    ``mean_absolute_percentage_error`` with its epsilon); the deviances as its
    ``_mean_tweedie_deviance`` before the mean (Poisson is power 1, gamma power 2).
    """
    if name == "pinball_loss":
        alpha, diff = float(options["alpha"]), y - pred
        return alpha * np.maximum(diff, 0.0) + (1.0 - alpha) * np.maximum(-diff, 0.0)
    if name == "mape":
        return np.abs(pred - y) / np.maximum(np.abs(y), np.finfo(np.float64).eps)
    power = {"poisson_deviance": 1.0, "gamma_deviance": 2.0}.get(name, float(options.get("power") or 0.0))
    if (power != 0 and (pred <= 0).any()) or (1 <= power < 2 and (y < 0).any()) or (power >= 2 and (y <= 0).any()):
        return None
    if power == 0:
        return np.square(y - pred)
    if power == 1:
        return 2 * (xlogy(y, y / pred) - y + pred)
    if power == 2:
        return 2 * (np.log(pred / y) + y / pred - 1)
    base = np.maximum(y, 0) if power < 0 else y
    return 2 * (np.power(base, 2 - power) / ((1 - power) * (2 - power)) - y * np.power(pred, 1 - power) / (1 - power)
                + np.power(pred, 2 - power) / (2 - power))
