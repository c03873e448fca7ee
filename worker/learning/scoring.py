"""Compute the metrics a submission asked for, with scikit-learn's own metric functions.

A metric is named by its key (``service.catalog.metric_keys``): ``f1(average=weighted)``,
``pinball_loss(alpha=0.9)``; each option goes to scikit-learn's function as the argument of the same
name. Classification conventions (the catalog and API describe the same):
- the classes are the dataset's (the sorted labels of its development target, ``class_labels``), never
  a fold model's ``classes_``: a model that never saw a class gets a zero probability column for it,
  and every metric whose scikit-learn function takes ``labels=`` is told the full class set, so a fold
  whose training rows miss a class is still scored as the task it belongs to
  (``matthews_corrcoef`` and ``balanced_accuracy_score`` take no labels: the first is unchanged by
  a class absent from both labels and predictions, the second averages the classes present);
- binary: the positive class is the key's ``pos_label``, by default ``classes[1]``, the larger label in
  scikit-learn's sorted order; ``roc_auc`` and ``brier`` use the probability of ``classes[1]``;
- an average missing from a key (keys stored before averages were spelled out) is ``binary`` on two
  classes and ``macro`` on more; ``roc_auc`` is one-vs-rest macro; ``brier`` is binary only;
- ``average_precision`` on more than two classes binarises the labels one-vs-rest against the
  dataset's classes and averages as declared; ``macro`` is undefined when a class has no scored row.
A metric scikit-learn cannot compute on the rows (it raises, or returns a non-finite value such as
``roc_auc`` on a test fold with one class, or a deviance on a non-positive prediction) is reported
as None, with the reason.
"""

from __future__ import annotations

import contextlib
import math
import warnings
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
import sklearn
from sklearn import metrics as skm
from sklearn.preprocessing import label_binarize

from service.catalog.metric_keys import parse_key
from service.catalog.metrics import METRICS, spec_of

Options = Mapping[str, Any]
Metric = Callable[[np.ndarray, Any, Any, np.ndarray, Options], float]


def _binary(classes: np.ndarray, name: str) -> None:
    if len(classes) != 2:
        raise ValueError(f"{name} needs a binary target, got {len(classes)} classes")


def _positive(classes: np.ndarray, options: Options) -> Any:
    """Return the dataset class the key's ``pos_label`` names (compared as text), by default ``classes[1]``."""
    wanted = options.get("pos_label")
    if wanted is None:
        return classes[1]
    for label in classes:
        if str(label) == str(wanted):
            return label
    raise ValueError(f"pos_label {wanted!r} is not one of the classes {[str(c) for c in classes]}")


def _by_label(function: Callable[..., Any], name: str) -> Metric:
    """Return precision, recall or F1 as the key averages it (scikit-learn's ``average=``)."""
    def metric(y: np.ndarray, pred: Any, _proba: Any, classes: np.ndarray, options: Options) -> float:
        average = options.get("average") or ("binary" if len(classes) == 2 else "macro")
        if average == "binary":
            _binary(classes, f"{name} with average=binary")
            return float(function(y, pred, pos_label=_positive(classes, options), average="binary"))
        return float(function(y, pred, labels=classes, average=average))
    return metric


def _average_precision(y: np.ndarray, _pred: Any, proba: Any, classes: np.ndarray, options: Options) -> float:
    if len(classes) == 2:
        positive = _positive(classes, options)
        truth = y == positive
        if not truth.any():
            raise ValueError(f"no scored row is of the positive class {str(positive)!r}: average precision is "
                             "undefined")
        return float(skm.average_precision_score(truth, proba[:, int(np.flatnonzero(classes == positive)[0])]))
    average = options.get("average") or "macro"
    indicator = label_binarize(y, classes=classes)
    absent = [str(c) for c, n in zip(classes, indicator.sum(axis=0), strict=True) if n == 0]
    if absent and average == "macro":
        raise ValueError(f"no scored row is of class {', '.join(absent)}: its average precision is undefined, and so "
                         "is their macro average")
    return float(skm.average_precision_score(indicator, proba, average=average))


def _roc_auc(y: np.ndarray, _pred: Any, proba: Any, classes: np.ndarray, _options: Options) -> float:
    if len(classes) == 2:
        return float(skm.roc_auc_score(y == classes[1], proba[:, 1]))
    return float(skm.roc_auc_score(y, proba, multi_class="ovr", average="macro", labels=classes))


def _brier(y: np.ndarray, _pred: Any, proba: Any, classes: np.ndarray, _options: Options) -> float:
    _binary(classes, "brier")
    return float(skm.brier_score_loss(y, proba[:, 1], pos_label=classes[1]))


def _values(function: Callable[..., Any], **fixed: Any) -> Metric:
    """Return a metric of values and predictions; the key's options are passed as keyword arguments."""
    def metric(y: np.ndarray, pred: Any, _proba: Any, _classes: np.ndarray, options: Options) -> float:
        return float(function(y, pred, **fixed, **options))
    return metric


METRIC_FUNCTIONS: dict[str, Metric] = {
    "rmse": _values(skm.root_mean_squared_error),
    "mse": _values(skm.mean_squared_error),
    "mae": _values(skm.mean_absolute_error),
    "r2": _values(skm.r2_score),
    "explained_variance": _values(skm.explained_variance_score),
    "median_absolute_error": _values(skm.median_absolute_error),
    "mape": _values(skm.mean_absolute_percentage_error),
    "pinball_loss": _values(skm.mean_pinball_loss),
    "poisson_deviance": _values(skm.mean_poisson_deviance),
    "gamma_deviance": _values(skm.mean_gamma_deviance),
    "tweedie_deviance": _values(skm.mean_tweedie_deviance),
    "accuracy": _values(skm.accuracy_score),
    "balanced_accuracy": _values(skm.balanced_accuracy_score),
    "precision": _by_label(skm.precision_score, "precision"),
    "recall": _by_label(skm.recall_score, "recall"),
    "f1": _by_label(skm.f1_score, "f1"),
    "matthews_corrcoef": _values(skm.matthews_corrcoef),
    "average_precision": _average_precision,
    "roc_auc": _roc_auc,
    "log_loss": lambda y, _pred, proba, classes, _o: float(skm.log_loss(y, proba, labels=classes)),
    "brier": _brier,
}


def compute(
    key: str, y_true: Any, y_pred: Any = None, proba: Any = None, classes: Any = None
) -> float | None:
    """Return one metric (by key) from labels or values, predictions and (for some) class probabilities."""
    name, options = parse_key(key)
    y = np.asarray(y_true)
    labels = np.asarray(classes) if classes is not None else np.array([])
    if METRICS[name].task == "classification" and classes is None:
        labels = np.unique(y)
    # A regression key without options hands scikit-learn two arrays made here and nothing of the submitter's,
    # so its parameter validation (a third of such a metric's time on a small fold) cannot fail: skipped.
    # The functions' own checks of the values (shapes, finiteness) still run.
    checks = sklearn.config_context(skip_parameter_validation=True) \
        if not options and METRICS[name].task == "regression" else contextlib.nullcontext()
    with checks:
        value = METRIC_FUNCTIONS[name](y, None if y_pred is None else np.asarray(y_pred),
                                       None if proba is None else np.asarray(proba), labels,
                                       {k: float(v) if k in ("alpha", "power") else v for k, v in options.items()})
    return value if math.isfinite(value) else None


def class_labels(y: np.ndarray) -> np.ndarray:
    """Return the sorted distinct labels of a target: the class set every classification metric uses.

    Called on the whole development target, so every fold, the baseline, the search's inner folds
    and the holdout refit are scored against the same classes whatever rows their models saw (the
    holdout contributes nothing). The labels are sorted as scikit-learn sorts ``classes_``
    (``np.unique``); hashing first (``pd.unique``) keeps the sort to the few distinct values.
    """
    return np.unique(pd.unique(np.asarray(y)))


def class_probabilities(proba: np.ndarray, model_classes: Any, classes: np.ndarray) -> np.ndarray:
    """Return ``proba`` with one column per class of ``classes``, in its order; zeros for unseen classes.

    A model fitted on rows that lack a class has no column for it, and its probability of that
    class is zero; padding keeps each column the probability of the same class for every model.
    """
    seen = np.asarray(model_classes)
    if len(seen) == len(classes) and np.array_equal(seen, classes):
        return proba
    columns = np.searchsorted(classes, seen)
    if not (columns < len(classes)).all() or not np.array_equal(classes[columns], seen):
        raise ValueError(f"the model's classes {seen.tolist()} are not all among the dataset's {classes.tolist()}")
    full = np.zeros((proba.shape[0], len(classes)), dtype=np.result_type(proba.dtype, np.float64))
    full[:, columns] = proba
    return full


def predictions(
    model: Any, X: Any, metric_names: Sequence[str], classes: Any = None, *, proba: bool = False
) -> tuple[Any, Any, Any]:
    """Predict once: labels and/or probabilities as the metrics need, and the classes to score them on.

    With ``classes`` (the dataset's, ``class_labels``) the probabilities get one column per class in
    that order (``class_probabilities``) and the classes returned are those; without, the model's
    ``classes_``. ``proba``: predict probabilities even if no metric needs them (for calibration).
    """
    needs_proba = proba or any(spec_of(m).needs_proba for m in metric_names)
    needs_pred = any(not spec_of(m).needs_proba or m in PER_EXAMPLE_FROM_LABELS for m in metric_names)
    pred = model.predict(X) if needs_pred else None
    probabilities = model.predict_proba(X) if needs_proba else None
    if classes is None:
        return pred, probabilities, getattr(model, "classes_", None)
    labels = np.asarray(classes)
    if probabilities is not None:
        probabilities = class_probabilities(np.asarray(probabilities), model.classes_, labels)
    return pred, probabilities, labels


def score_predictions(
    y: Any, pred: Any, proba: Any, classes: Any, metric_names: Sequence[str]
) -> tuple[dict[str, float | None], dict[str, str]]:
    """Compute every metric from one set of predictions; see ``score_model`` for undefined metrics."""
    scores: dict[str, float | None] = {}
    undefined: dict[str, str] = {}
    for name in metric_names:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                scores[name] = compute(name, y, pred, proba, classes)
            except ValueError as exc:
                scores[name], undefined[name] = None, str(exc)
        if scores[name] is None and name not in undefined:
            said = [str(w.message) for w in caught]
            undefined[name] = "; ".join(dict.fromkeys(said)) if said else "the value is not a finite number"
        for w in caught:  # passed on to the caller's own warning filters
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return scores, undefined


def score_model(
    model: Any, X: Any, y: Any, metric_names: Sequence[str], classes: Any = None
) -> tuple[dict[str, float | None], dict[str, str]]:
    """Predict once (labels and/or probabilities as the metrics need) and compute every metric.

    ``classes``: the dataset's class set (``class_labels``) for a classification; without it, the
    model's own ``classes_``. Returns the scores and, per metric scikit-learn could not compute on
    these rows (e.g. ``roc_auc`` on a fold with one class), the reason; such a metric scores None.
    """
    pred, proba, labels = predictions(model, X, metric_names, classes)
    return score_predictions(y, pred, proba, labels, metric_names)


PER_EXAMPLE_FROM_LABELS = frozenset({"rmse", "mse", "mae", "accuracy"})

# Training rows scored at most per fit; above this, a seeded random sample of about this many.
TRAIN_SCORE_ROWS = 100_000
_TRAIN_SAMPLE_SEED = 0x5EA1F01D


def training_sample(n_train: int, repeat: int, fold: int, limit: int | None = None) -> np.ndarray | None:
    """Return the positions among a fit's ``n_train`` training rows whose scores stand for all of them.

    None (score every row) up to ``limit`` rows (default ``TRAIN_SCORE_ROWS``). Above it, each row
    is kept with probability limit / n_train, so about ``limit`` rows, in their order; the seed is
    fixed per (repeat, fold), so every submission on a fold plan scores the same rows and their
    training scores stay paired. A training score is a mean over rows: on 100,000 rows its sampling
    error is far below anything a fit gap is read from, while scoring every row of a million-row
    fold costs a full prediction pass -- for an ensemble, more than the fold's test rows (sampling
    the training rows for a training score is common practice: scikit-learn's histogram gradient
    boosting scores early stopping on a 10,000-row subsample of the training data, from memory).
    """
    limit = TRAIN_SCORE_ROWS if limit is None else limit
    if n_train <= limit:
        return None
    draws = np.random.default_rng([_TRAIN_SAMPLE_SEED, repeat, fold]).random(n_train)
    return np.flatnonzero(draws < limit / n_train)


def rows_to_score(X: Any, y: np.ndarray, sample: np.ndarray | None) -> tuple[Any, np.ndarray]:
    """Return the training rows to score: all of them, or copies of the ``training_sample`` positions."""
    if sample is None:
        return X, y
    if isinstance(X, np.ndarray):  # np.take copies whole rows; X[sample] copies value by value, 3x slower
        return np.take(X, sample, axis=0), y[sample]
    return (X.iloc[sample] if hasattr(X, "iloc") else X[sample]), y[sample]

